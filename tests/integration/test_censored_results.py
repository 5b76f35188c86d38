"""Results sent as beyond a limit (">500 mmHg") are kept and shown, never used.

Messages built with hl7apy (HL7 v2.5.1, strict validation), ingested by ``gasgap
ingest`` as a user runs it. HL7 v2 SN (structured numeric) is comparator^number
(HL7 v2.5 chapter 2A, from memory); a comparator makes the value censored: not an exact
number, so nothing may be derived from it, but a person must be able to see it was sent.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from datetime import UTC, datetime
from pathlib import Path

import pytest
import sqlalchemy as sa
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.core import Message

from monitor.ingest import SourceContext, inbound_from_hl7
from monitor.pipeline import Pipeline
from storage.db import open_database

ROOT = Path(__file__).resolve().parents[2]


def _message(control: str, pao2: tuple[str, str], status: str, sent: str = "20260315090000") -> str:
    """An invented arterial gas of one patient of the invented hospital, PaO2 as
    (value type, value), PaCO2 38 mmHg and FiO2 100 %, the message sent at ``sent``
    (MSH-7, site time)."""
    m = Message("ORU_R01", version="2.5.1", validation_level=VALIDATION_LEVEL.STRICT)
    m.msh.msh_3, m.msh.msh_7, m.msh.msh_9 = "HGH-LAB", sent, "ORU^R01^ORU_R01"
    m.msh.msh_10, m.msh.msh_11 = control, "P"
    patient = m.add_group("ORU_R01_PATIENT_RESULT").add_group("ORU_R01_PATIENT")
    patient.pid.pid_3 = "HM100777^^^HGH&2.999.1.1.1&ISO^MR"
    patient.pid.pid_5 = "Larkspur^Wendeline"  # invented
    patient.pid.pid_7 = "19610402"
    patient.add_group("ORU_R01_VISIT").pv1.pv1_2 = "I"
    order = m.children[1].add_group("ORU_R01_ORDER_OBSERVATION")
    order.obr.obr_3, order.obr.obr_7 = "F-20260315-0777", "202603150840"
    order.obr.obr_4 = "24336-0^Gas panel - Arterial blood^LN"
    rows = [("2703-7", *pao2, "mm[Hg]"), ("2019-8", "NM", "38", "mm[Hg]")]
    rows.append(("3150-0", "NM", "100", "%"))
    for i, (code, value_type, value, unit) in enumerate(rows, 1):
        obx = order.add_group("ORU_R01_OBSERVATION").obx
        obx.obx_1, obx.obx_2, obx.obx_3 = str(i), value_type, f"{code}^^LN"
        obx.obx_5, obx.obx_6, obx.obx_11 = value, unit, status
    order.add_group("ORU_R01_SPECIMEN").spm.spm_4 = "BLDA^Blood arterial^HL70487"
    m.validate()
    return str(m.to_er7())


def _gasgap(cwd: Path, *args: str) -> dict[str, object]:
    done = subprocess.run(
        [sys.executable, "-m", "monitor.cli", *args, "--json"],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=cwd,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
    )
    assert done.returncode == 0, done.stderr
    return dict(json.loads(done.stdout))


def test_a_censored_pao2_is_kept_shown_and_never_derived(tmp_path: Path) -> None:
    db = tmp_path / "censored.db"
    url = f"sqlite:///{db}"
    first = tmp_path / "lab-1.hl7"
    first.write_text(_message("HGH0901", ("SN", ">^500"), "F") + "\r", encoding="utf-8")

    ingested = _gasgap(tmp_path, "ingest", str(first), "--db", url, "--no-progress")
    assert ingested["beyond_limits"] == 1 and ingested["quarantined"] == 0
    # the same message again changes nothing (one row per result)
    _gasgap(tmp_path, "ingest", str(first), "--db", url, "--no-progress")
    with sqlite3.connect(db) as conn:
        [(key, kind, comparator, limit)] = conn.execute(
            "select patient_key, kind, comparator, limit_value from censored_results"
        ).fetchall()
        pao2_readings = conn.execute("select count(*) from readings where kind = 'pao2'")
        assert pao2_readings.fetchone()[0] == 0  # never an exact PaO2
        assert conn.execute("select count(*) from derivations").fetchone()[0] == 0
    assert (kind, comparator, limit) == ("pao2", ">", 500.0)

    shown = _gasgap(tmp_path, "patient", key, "--db", url)
    [beyond] = shown["beyond_limits"]  # type: ignore[misc]
    assert beyond["sent_as"] == ">500 mm[Hg]" and beyond["used"] is False
    assert shown["series"] == []

    # The lab corrects the result to an exact number (OBX-11 C): the reading is used,
    # and the censored row is no longer shown beside it.
    second = tmp_path / "lab-2.hl7"
    second.write_text(_message("HGH0902", ("NM", "512"), "C") + "\r", encoding="utf-8")
    _gasgap(tmp_path, "ingest", str(second), "--db", url, "--no-progress")
    shown = _gasgap(tmp_path, "patient", key, "--db", url)
    assert shown["beyond_limits"] == []
    [gas] = shown["series"]  # type: ignore[misc]
    assert gas["pao2"] == 512.0 and gas["fio2"] == 1.0


@pytest.mark.parametrize("order", ["as sent", "the correction first"])
def test_of_two_versions_of_a_censored_result_the_later_known_stands(
    db_url: str, order: str
) -> None:
    # The lab sends ">500" at 09:00 and corrects it to ">450" (OBX-11 C) at 09:20; a
    # feed that delivers the correction first must end with the same row.
    first = _message("HGH0911", ("SN", ">^500"), "F", sent="20260315090000")
    correction = _message("HGH0912", ("SN", ">^450"), "C", sent="20260315092000")
    deliveries = [first, correction] if order == "as sent" else [correction, first]
    db = open_database(db_url)
    pipeline = Pipeline(db)
    context = SourceContext(patient_id_system="urn:oid:2.999.1.1.1")
    try:
        for n, text in enumerate(deliveries):
            now = datetime(2026, 3, 15, 10, n, tzinfo=UTC)
            inbound = inbound_from_hl7(text.encode(), received_at=now, context=context)
            pipeline.accept(inbound, now=now)
        with db.begin(read_only=True) as conn:
            rows = conn.execute(
                sa.text("select comparator, original_value, known_at from censored_results")
            ).all()
    finally:
        db.dispose()
    [(comparator, value, known_at)] = rows
    assert (comparator, value) == (">", "450")
    # MSH-7 09:20 site time; the default site zone is UTC (monitor.config defaults)
    assert str(known_at).startswith("2026-03-15 09:20")


def test_the_board_shows_a_censored_result_apart_from_the_gases(tmp_path: Path) -> None:
    import asyncio
    from urllib.parse import quote

    import httpx

    from monitor.bootstrap import pipeline_settings
    from monitor.config import default_config
    from monitor.pipeline import Pipeline
    from monitor.web.app import create_app
    from monitor.web.security import WebSecurity
    from storage.db import open_database

    url = f"sqlite:///{tmp_path / 'board.db'}"
    feed = tmp_path / "lab.hl7"
    feed.write_text(_message("HGH0911", ("SN", ">^500"), "F") + "\r", encoding="utf-8")
    _gasgap(tmp_path, "ingest", str(feed), "--db", url, "--no-progress")
    db = open_database(url)
    with db.begin(read_only=True) as conn:
        from storage.censored import censored_for_patient
        from storage.tables import censored_results

        key = conn.execute(censored_results.select()).first()._mapping["patient_key"]  # type: ignore[union-attr]
        assert len(censored_for_patient(conn, key)) == 1
    security = WebSecurity(board_token="board-code-for-tests-only-77", secure_cookies=False)
    app = create_app(db, Pipeline(db, pipeline_settings(default_config())), security=security)

    async def page() -> httpx.Response:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as c:
            signed = await c.get("/board", params={"token": "board-code-for-tests-only-77"})
            assert signed.status_code == 303
            return await c.get("/board/patient/" + quote(key, safe=""))

    try:
        response = asyncio.run(page())
    finally:
        db.dispose()
    assert response.status_code == 200
    text = response.text
    assert "Results sent as beyond a limit" in text and "&gt;500 mm[Hg]" in text
    assert 'data-kind="beyond-limit"' in text and "No blood gas recorded." in text
