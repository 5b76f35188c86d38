"""`gasgap quarantine` as an interface analyst runs it: list, show, re-process after a
code mapping is added, purge. Invented data (Hollowmere General Hospital; the local
lab code PO2A is invented). The mapping it needs is LOINC 2703-7's meaning, oxygen
partial pressure in arterial blood (LOINC table; shared/reference section 10).
"""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

from storage.db import open_database, upgrade
from storage.quarantine import quarantine
from tests import hl7_samples as h


def gasgap(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor.cli", *args], capture_output=True, text=True, timeout=300
    )


def test_list_show_reprocess_with_a_new_mapping_and_purge(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path}/gasgap.db"
    config = tmp_path / "site.toml"
    config.write_text(
        '[site]\nname = "Hollowmere General Hospital"\nelevation_m = 1600\n'
        'timezone = "America/Denver"\npatient_id_system = "urn:oid:2.999.1.1.1"\n\n'
        f'[database]\nurl = "{url}"\n'
    )
    upgrade(url)
    now = datetime.now(UTC)
    sent = (now - timedelta(hours=1)).strftime("%Y%m%d%H%M%S+0000")
    message = h.message(
        h.msh("QCLI1", when=sent),
        h.pid("HM770001"),
        h.obr("F-QCLI1"),
        "OBX|1|NM|PO2A^PO2 art^L||81|mm[Hg]|||||F",
    ).encode()
    db = open_database(url)
    with db.begin() as conn:
        item = quarantine(
            conn,
            source="hl7:lab",
            raw=message,
            reason="message QCLI1 OBX[1]-3: code PO2A^L is not mapped",
            received_at=now,
        )
        old = quarantine(
            conn,
            source="fhir:ehr",
            raw='{"resourceType": "Basic"}',
            reason="resourceType 'Basic' is not taken",
            received_at=now - timedelta(days=400),
        )
    db.dispose()

    listed = gasgap("quarantine", "list", "--config", str(config), "--json")
    assert listed.returncode == 0, listed.stderr
    rows = [json.loads(line) for line in listed.stdout.splitlines()]
    assert [r["id"] for r in rows] == [item, old]
    assert "HM770001" not in listed.stdout  # a listing never prints the payload

    shown = gasgap("quarantine", "show", str(item), "--config", str(config), "--raw")
    assert shown.returncode == 0 and "PO2A" in shown.stdout and "OBX|1|NM" in shown.stdout

    # Without the mapping nothing reads (exit 1, item stays open); with it (a site code
    # table), the result is stored.
    before = gasgap("quarantine", "reprocess", str(item), "--config", str(config))
    assert before.returncode == 1 and "nothing read" in before.stdout
    codes = tmp_path / "site-codes.toml"
    # (the system as a URI: a site file's "L" is not mapped to it, see the report)
    codes.write_text(
        '[[code]]\nsystem = "urn:gasgap:local"\ncode = "PO2A"\nkind = "pao2"\n'
        'specimen = "arterial"\n'
    )
    again = gasgap(
        "quarantine", "reprocess", str(item), "--config", str(config), "--codes", str(codes)
    )
    assert again.returncode == 0, again.stderr + again.stdout
    assert "1 stored" in again.stdout
    still_open = gasgap("quarantine", "list", "--config", str(config), "--open", "--json")
    assert [json.loads(line)["id"] for line in still_open.stdout.splitlines()] == [old]

    purged = gasgap("quarantine", "purge", "--config", str(config), "--older-than-days", "365")
    assert purged.returncode == 0 and purged.stdout.startswith("1 ")
    gone = gasgap("quarantine", "purge", "--config", str(config), "--id", str(item))
    assert gone.stdout.startswith("1 ")
    empty = gasgap("quarantine", "list", "--config", str(config))
    assert "quarantine is empty" in empty.stdout
