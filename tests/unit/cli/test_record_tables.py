"""``gasgap patient`` and ``gasgap alerts`` output as a nurse reads it: estimates in
their own table, plain column heads, a note on every row said once, times with dates
and a correctly signed zone; an unknown unit and a missing database said plainly.
Data: the invented ICU-North beds of tests/browser/hospital.py (values worked by hand)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

from monitor.bootstrap import database_problem
from monitor.cli.records import (
    _table,
    alerts_table,
    series_row,
    unit_problem,
    write_trend_plot,
)
from monitor.engine.model import AlertState, Priority
from tests.browser.hospital import estimate, flag, gas

NOW = datetime(2026, 3, 5, 16, 0, tzinfo=UTC)
DENVER = ZoneInfo("America/Denver")


def _series() -> list:
    return [
        gas("HM730001", "1", NOW - timedelta(hours=5), 95, 0.50, aa=180, n=1),
        estimate("HM730001", "1", NOW - timedelta(hours=2), 89, 0.50, 1),
        gas("HM730001", "1", NOW - timedelta(minutes=20), 60, 0.80, aa=420, n=2),
    ]


def test_patient_table_keeps_estimates_apart_and_heads_columns_plainly() -> None:
    text = _table([series_row(d, 1) for d in _series()], DENVER)
    gases, estimates = text.split("Estimates from SpO2")
    assert "178" not in gases  # S/F 89 / 0.50, worked by hand: only in its own table
    assert "178" in estimates
    assert "P/F sl" not in text and "P/F alt." in gases
    # 16:00 UTC on 5 March is 09:00 MST (UTC-7; US daylight time starts 8 March 2026,
    # from memory).
    assert "Times: site time, UTC-07:00" in gases
    assert "2026-03-05 08:40" in gases and "2026-03-05 04:00" in gases
    assert "2026-03-05 07:00" in estimates  # 14:00 UTC


def test_a_note_on_every_gas_is_said_once() -> None:
    rows = [series_row(d, 1) for d in _series()]
    for r in rows:
        if not r["estimated"]:
            r["flags"] = ["default body temperature"]
    text = _table(rows, DENVER)
    assert text.count("default body temperature") == 1
    assert "On every gas: default body temperature." in text


def test_alerts_table_has_raised_time_with_date_and_rule_in_words() -> None:
    alerts = [
        flag(
            "HM730001",
            "1",
            "aa-rise",
            Priority.MEDIUM,
            NOW - timedelta(days=9),
            "A-a rise: +30 mmHg",
        ),
        flag(
            "HM730002",
            "2",
            "oxygenation-band",
            Priority.HIGH,
            NOW,
            "P/F <= 100: P/F 90",
            state=AlertState.ACKNOWLEDGED,
            by="Ines Calloway",
        ),
    ]
    drawn = {alerts[0].alert_id: NOW - timedelta(days=9, minutes=40)}
    text = alerts_table(alerts, DENVER, NOW, drawn)
    assert "2026-02-24 09:00" in text  # nine days before 16:00 UTC, in MST
    # The gas behind the first flag was drawn 40 min before it was raised: its draw
    # time is shown before the raise time; the second flag's is unknown ("-").
    first = next(line for line in text.splitlines() if "aa-rise" in line or "widening" in line)
    assert first.index("2026-02-24 08:20") < first.index("2026-02-24 09:00")
    assert "drawn" in text.splitlines()[1] and "raised" in text.splitlines()[1]
    assert "A\u2013a gradient widening" in text and " aa-rise " not in text
    assert "Times: site time, UTC-07:00" in text


def test_unknown_unit_and_missing_database_are_said() -> None:
    known = ["ICU-North", "Ward-5"]
    assert unit_problem(known, "ICU-North") is None
    said = unit_problem(known, "icu-north")
    assert said is not None and "unknown unit" in said and "ICU-North?" in said
    assert unit_problem(known, None) is None
    assert "no database" in (database_problem("sqlite:////nowhere/here/gasgap.db") or "")
    assert database_problem("postgresql+psycopg://x@localhost/db") is None


def test_plot_is_written_in_site_time(tmp_path: Path) -> None:
    out = Path("test-artifacts") / "cli-patient-plot.png"
    write_trend_plot(_series(), out, title="HM730001", tz=DENVER)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
