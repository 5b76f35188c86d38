"""`gasgap config check` says which secrets the site file names are not set where it
runs, so `outbox send` or `serve` cannot stop on one right after "configuration is
valid" (issue 16). The site and variable names are invented."""

from __future__ import annotations

from pathlib import Path

import pytest

from monitor.cli import main

SITE = """
[site]
name = "Hollowmere General Hospital"
timezone = "UTC"

[channels.station]
type = "webhook"
url = "http://127.0.0.1:9/hook"
token_env = "GASGAP_TEST_STATION_TOKEN"

[routes]
default = ["station"]
"""


def test_an_unset_channel_secret_is_named(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("GASGAP_TEST_STATION_TOKEN", raising=False)
    site = tmp_path / "site.toml"
    site.write_text(SITE)
    assert main(["config", "check", str(site)]) == 0
    err = capsys.readouterr().err
    assert "GASGAP_TEST_STATION_TOKEN is not set" in err


def test_a_set_secret_is_not_mentioned(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("GASGAP_TEST_STATION_TOKEN", "invented-token")
    site = tmp_path / "site.toml"
    site.write_text(SITE)
    assert main(["config", "check", str(site)]) == 0
    assert "GASGAP_TEST_STATION_TOKEN" not in capsys.readouterr().err
