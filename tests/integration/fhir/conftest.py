"""FHIR integration tests run against the real FHIR test server (tests/fhir_server.py).

``smart_fhir_server`` starts a second instance of the same server that guards its API
with SMART Backend Services (its own token endpoint, ``/auth/token``, announced in
``/.well-known/smart-configuration``), with gasgap's test clients registered by JWKS:

- ``gasgap-test``: reads Patient, Encounter and Observation, and may run and delete
  bulk exports (the server checks the job URLs against ``system/*`` scopes);
- ``gasgap-rsa``: the same reads, with an RS384 key;
- ``gasgap-narrow``: may read Patient only (a site that forgot a scope).

A static bearer token (``LOADER_TOKEN``) lets the tests load the invented population.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec, rsa

from adapters.fhir.smart import public_jwk
from tests.conftest import service_missing
from tests.fhir_server import SERVER_COMMAND, fhir_server, free_port, running_server

__all__ = ["fhir_server", "smart_fhir_server"]

LOADER_TOKEN = "hollowmere-loader-not-a-secret"
READ_SCOPES = "system/Observation.rs system/Patient.rs system/Encounter.rs"


@dataclass(frozen=True)
class SmartServer:
    base_url: str
    """…/fhir"""
    token_url: str
    ec_key_pem: str
    """gasgap-test's ES384 private key (registered)."""
    rsa_key_pem: str
    """gasgap-rsa's RS384 private key."""
    stranger_key_pem: str
    """An ES384 key nobody registered."""


def _pem(key: ec.EllipticCurvePrivateKey | rsa.RSAPrivateKey) -> str:
    return key.private_bytes(
        serialization.Encoding.PEM,
        serialization.PrivateFormat.PKCS8,
        serialization.NoEncryption(),
    ).decode()


@pytest.fixture(scope="session")
def smart_fhir_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[SmartServer]:
    if not SERVER_COMMAND.exists():
        service_missing(
            "FHIR test server",
            f"{SERVER_COMMAND} not found: python3 -m venv .fhir-venv && "
            ".fhir-venv/bin/pip install sekmet-fhir==0.1.1",
        )
    ec_key = ec.generate_private_key(ec.SECP384R1())
    rsa_key = rsa.generate_private_key(public_exponent=65537, key_size=2048)
    stranger = ec.generate_private_key(ec.SECP384R1())
    # one key type per client: this server tries every registered key on an assertion,
    # and a key of the other type makes it answer 500 instead of invalid_client
    ec_jwks = {"keys": [public_jwk(ec_key, "ES384", "hg-ec-1")]}
    rsa_jwks = {"keys": [public_jwk(rsa_key, "RS384", "hg-rsa-1")]}
    directory = tmp_path_factory.mktemp("fhir-smart-server")
    port = free_port()
    base_url = f"http://127.0.0.1:{port}/fhir"
    settings = {
        "base_url": base_url,
        "host": "127.0.0.1",
        "port": port,
        "data_dir": str(directory / "data"),
        "own_private_key_path": str(directory / "keys" / "server.pem"),
        "facility_name": "Hollowmere General Hospital (SMART test server)",
        "simulator": {"enabled": False},
        "log_inbound": False,
        "server_auth": {
            "types": ["smart", "bearer"],
            "tokens": [LOADER_TOKEN],
            "token_lifetime": 600,
            "enforce_scopes": True,
            "smart_clients": [
                {
                    "client_id": "gasgap-test",
                    "jwks": ec_jwks,
                    "scopes": f"{READ_SCOPES} system/*.rds",
                },
                {"client_id": "gasgap-rsa", "jwks": rsa_jwks, "scopes": READ_SCOPES},
                {"client_id": "gasgap-narrow", "jwks": ec_jwks, "scopes": "system/Patient.rs"},
                {
                    # FHIR write-back: the notify channel's Flag and Communication
                    "client_id": "gasgap-writer",
                    "jwks": ec_jwks,
                    "scopes": "system/Flag.cru system/Communication.cru",
                },
            ],
        },
    }
    path = directory / "settings.yaml"
    path.write_text(json.dumps(settings, indent=1))  # JSON is YAML
    with running_server(directory, path, base_url, "FHIR test server (SMART)"):
        yield SmartServer(
            base_url,
            f"http://127.0.0.1:{port}/auth/token",
            _pem(ec_key),
            _pem(rsa_key),
            _pem(stranger),
        )
