"""`gasgap ingest` and `gasgap patient` as a user runs them, on the invented demo feed
(fixtures/demo; what each patient shows is written in fixtures/demo/SCENARIO.md)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
CONFIG = Path(__file__).resolve().parents[2] / "fixtures" / "site-example.toml"


def gasgap(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor.cli", *args], capture_output=True, text=True, timeout=600
    )


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory: pytest.TempPathFactory) -> str:
    url = f"sqlite:///{tmp_path_factory.mktemp('cli')}/demo.db"
    done = gasgap(
        "ingest",
        *(str(p) for p in sorted(DEMO.glob("feed-*"))),
        "--db",
        url,
        "--config",
        str(CONFIG),
        "--no-progress",
    )
    assert done.returncode == 0, done.stderr
    assert "stored" in done.stdout and "quarantined 0" in done.stdout
    return url


def test_ingest_twice_stores_nothing_new(demo_db: str) -> None:
    done = gasgap(
        "ingest",
        *(str(p) for p in sorted(DEMO.glob("feed-*"))),
        "--db",
        demo_db,
        "--config",
        str(CONFIG),
        "--no-progress",
        "--json",
    )
    summary = json.loads(done.stdout)
    assert summary["stored"] == 0 and summary["duplicates"] > 0 and summary["derivations"] == 0


def test_patient_series_shows_the_ventilated_patients_worst_gas(demo_db: str) -> None:
    done = gasgap("patient", "HGH-1007", "--db", demo_db, "--config", str(CONFIG), "--json")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    series = out["series"]
    # SCENARIO.md: measured P/F 170 -> 95 -> 75 (adjusted 91) with PEEP 8-12.
    worst = min(series, key=lambda r: r["pf_ratio"])
    assert worst["pf_ratio"] == pytest.approx(75, abs=1)
    assert worst["pf_ratio_adjusted"] == pytest.approx(75 * 760 / 626.5, abs=1.5)
    assert worst["berlin_band"] == "severe"
    assert worst["fio2_source"] and worst["inputs"], "provenance is part of the series"
    assert "clinicians decide" in out["advisory"]


def test_patient_table_and_plot(demo_db: str, tmp_path: Path) -> None:
    plot = tmp_path / "trend.png"
    done = gasgap(
        "patient", "HGH-1007", "--db", demo_db, "--config", str(CONFIG), "--plot", str(plot)
    )
    assert done.returncode == 0, done.stderr
    assert "FiO2 from" in done.stdout and "clinicians decide" in done.stdout
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and plot.stat().st_size > 10_000


def test_the_venous_gas_shows_no_gradient(demo_db: str) -> None:
    out = json.loads(
        gasgap("patient", "HGH-1008", "--db", demo_db, "--config", str(CONFIG), "--json").stdout
    )
    venous = [r for r in out["series"] if r["specimen"] == "venous"]
    assert len(venous) == 1  # SCENARIO.md: one venous gas on 3 Mar
    assert venous[0]["aa_gradient"] is None and venous[0]["pf_ratio"] is None


def test_unknown_patient_is_one_line_and_exit_2(demo_db: str) -> None:
    done = gasgap("patient", "HGH-9999", "--db", demo_db)
    assert done.returncode == 2 and len(done.stderr.strip().splitlines()) == 1
