"""``gasgap fhir jwks``: prints the public JWKS of a source's SMART key, and one line
naming the problem otherwise. The printed key is checked by verifying a signature made
with the private key (PyJWT + cryptography), not against gasgap's own JWK code."""

from __future__ import annotations

import json
from pathlib import Path

import jwt
import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec

from monitor.cli import main

SITE = """
[[sources.fhir]]
name = "hollowmere-record"
base_url = "https://fhir.hollowmere.example/r4"

[sources.fhir.smart]
client_id = "gasgap-hollowmere"
private_key_env = "GASGAP_T_FHIR_KEY"
key_id = "hg-1"
algorithm = "ES384"
"""


def test_jwks_prints_the_public_key_only(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    key = ec.generate_private_key(ec.SECP384R1())
    pem = key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    ).decode()
    monkeypatch.setenv("GASGAP_T_FHIR_KEY", pem)
    site = tmp_path / "site.toml"
    site.write_text(SITE)
    assert main(["fhir", "jwks", "--config", str(site)]) == 0
    out = capsys.readouterr().out
    (jwk,) = json.loads(out)["keys"]
    assert "d" not in jwk and "PRIVATE" not in out and jwk["kid"] == "hg-1"
    signed = jwt.encode({"sub": "x"}, key, algorithm="ES384")
    assert jwt.decode(signed, jwt.PyJWK(jwk).key, algorithms=["ES384"]) == {"sub": "x"}


def test_jwks_names_what_is_missing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.delenv("GASGAP_T_FHIR_KEY", raising=False)
    site = tmp_path / "site.toml"
    site.write_text(SITE)
    assert main(["fhir", "jwks", "--config", str(site)]) == 2
    assert "GASGAP_T_FHIR_KEY" in capsys.readouterr().err
    assert main(["fhir", "jwks", "--config", str(site), "--source", "other"]) == 2
    assert "no FHIR source 'other'" in capsys.readouterr().err
