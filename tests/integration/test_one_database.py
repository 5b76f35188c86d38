"""Every command resolves the same database from the same site file.

A site file may keep its database URL in an environment variable
(``[database] url_env``). Before the composition root (``monitor.bootstrap``) was the
one place that resolved it, ``gasgap ingest``, ``patient`` and ``outbox`` read
``[database] url`` and wrote ./gasgap.db while ``db upgrade`` and ``alerts`` used the
named database: the flags were written where the board never looked. These tests run
the commands as a user does (a subprocess, the documented CLI) on the invented demo
feed, with the URL only in the environment.
"""

from __future__ import annotations

import json
import os
import re
import sqlite3
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from monitor.bootstrap import Secrets, database_url, load_site

ROOT = Path(__file__).resolve().parents[2]
LAB_FEED = ROOT / "fixtures" / "demo" / "feed-lab.hl7"


def _site(tmp_path: Path) -> Path:
    site = tmp_path / "site.toml"
    site.write_text(
        '[site]\nname = "Hollowmere test site"\ntimezone = "Etc/GMT-2"\n\n'
        '[database]\nurl = "sqlite:///never-this.db"\nurl_env = "GASGAP_TEST_ONE_DB_URL"\n',
        encoding="utf-8",
    )
    return site


def _gasgap(cwd: Path, env_url: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, GASGAP_TEST_ONE_DB_URL=env_url, PYTHONPATH=str(ROOT))
    return subprocess.run(
        [sys.executable, "-m", "monitor.cli", *args],
        capture_output=True,
        text=True,
        timeout=600,
        cwd=cwd,
        env=env,
    )


def test_bootstrap_prefers_the_named_variable_and_db_overrides_both(tmp_path: Path) -> None:
    config = load_site(_site(tmp_path))
    from_env = Secrets(environ={"GASGAP_TEST_ONE_DB_URL": "sqlite:///from-env.db"})
    assert database_url(config, from_env) == "sqlite:///from-env.db"
    assert database_url(config, from_env, "sqlite:///given.db") == "sqlite:///given.db"
    assert database_url(load_site(None), Secrets(environ={})) == "sqlite:///gasgap.db"


def test_every_command_uses_the_database_named_by_url_env(tmp_path: Path) -> None:
    site = _site(tmp_path)
    target = tmp_path / "named.db"
    url = f"sqlite:///{target}"
    config = ["--config", str(site)]

    upgraded = _gasgap(tmp_path, url, "db", "upgrade", *config)
    assert upgraded.returncode == 0, upgraded.stderr
    ingested = _gasgap(tmp_path, url, "ingest", str(LAB_FEED), *config, "--no-progress", "--json")
    assert ingested.returncode == 0, ingested.stderr
    stored = json.loads(ingested.stdout)["stored"]
    assert stored > 0

    # what ingest wrote is where the other commands look, and nothing went elsewhere
    assert not (tmp_path / "gasgap.db").exists()
    assert not (tmp_path / "never-this.db").exists()
    with sqlite3.connect(target) as conn:
        assert conn.execute("select count(*) from readings").fetchone()[0] == stored

    flags = _gasgap(tmp_path, url, "flags", *config, "--json")
    assert flags.returncode == 0, flags.stderr
    outbox = _gasgap(tmp_path, url, "outbox", *config, "--json")
    assert outbox.returncode == 0, outbox.stderr
    queued = json.loads(ingested.stdout)["notifications_queued"]
    in_outbox = sum(json.loads(outbox.stdout)["by_channel"].values())
    assert in_outbox == queued
    # SCENARIO.md: the lab feed alone raises flags for the invented patients
    assert len(json.loads(flags.stdout)["flags"]) > 0
    patient = _gasgap(tmp_path, url, "patient", "HGH-1007", *config, "--json")
    assert patient.returncode == 0, patient.stderr
    # The table shows, for every flag, when the gas behind its current priority was
    # drawn (read from the stored derivation); that gas was drawn before the flag last
    # changed on it. Site time is Etc/GMT-2 (POSIX sign: UTC+2).
    table = _gasgap(tmp_path, url, "flags", *config)
    stamp = r"(\d{4}-\d\d-\d\d \d\d:\d\d)"
    rows = re.findall(
        rf"^(?:low|medium|high)\s+\w+\s+{stamp}\s+{stamp}\s.*\s(\w+)$", table.stdout, re.M
    )
    changed = {f["id"]: f["updated_at"] for f in json.loads(flags.stdout)["flags"]}
    assert len(rows) == len(changed), table.stdout
    site = timezone(timedelta(hours=2))
    for drawn, _raised, alert_id in rows:
        at = datetime.strptime(drawn, "%Y-%m-%d %H:%M").replace(tzinfo=site)
        assert at <= datetime.fromisoformat(changed[alert_id].replace("Z", "+00:00")), alert_id


def test_an_unset_url_env_is_one_line_naming_it(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if k != "GASGAP_TEST_ONE_DB_URL"}
    env["PYTHONPATH"] = str(ROOT)
    for command in (["flags"], ["ingest", str(LAB_FEED)], ["db", "upgrade"], ["outbox"]):
        done = subprocess.run(
            [sys.executable, "-m", "monitor.cli", *command, "--config", str(_site(tmp_path))],
            capture_output=True,
            text=True,
            timeout=120,
            cwd=tmp_path,
            env=env,
        )
        assert done.returncode == 2, (command, done.stderr)
        assert "GASGAP_TEST_ONE_DB_URL" in done.stderr, command
        assert len(done.stderr.strip().splitlines()) == 1, done.stderr


@pytest.mark.parametrize("alias", ["alerts", "flags"])
def test_the_old_alerts_name_still_lists_flags(tmp_path: Path, alias: str) -> None:
    url = f"sqlite:///{tmp_path / 'empty.db'}"
    made = _gasgap(tmp_path, url, "db", "upgrade", "--config", str(_site(tmp_path)))
    assert made.returncode == 0, made.stderr  # an empty database, not a missing one
    done = _gasgap(tmp_path, url, alias, "--config", str(_site(tmp_path)))
    assert done.returncode == 0, done.stderr
    assert "no open flags" in done.stdout
    assert ("'alerts' is now 'flags'" in done.stderr) == (alias == "alerts")


@pytest.mark.parametrize(
    "command",
    [
        ["flags"],
        ["flags", "ack", "F-1", "--by", "Charge Nurse Okafor"],
        ["patient", "HGH-1007"],
        ["outbox"],
        ["outbox", "send"],
        ["quarantine", "list"],
    ],
)
def test_a_command_on_stored_data_never_makes_an_empty_database(
    tmp_path: Path, command: list[str]
) -> None:
    # Made afresh, an empty database would answer "no open flags", "no derivations" or
    # "nothing to send" about a site whose data is elsewhere: refused in one line.
    missing = tmp_path / "not-made.db"
    done = _gasgap(tmp_path, f"sqlite:///{missing}", *command, "--config", str(_site(tmp_path)))
    assert done.returncode == 2, done.stderr
    [line] = done.stderr.strip().splitlines()
    assert "no database at" in line and str(missing) in line
    assert not missing.exists()
