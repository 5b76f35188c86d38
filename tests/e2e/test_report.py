"""The replay report and the rule comparison.

The strict rule set (fixtures/site-strict.toml) is more watchful than the example by
construction: its P/F fall fires at 20 % (not 25 %), its band reaches medium and high at
P/F 250 and 150 (not 200 and 100), its A–a margins are tighter, oxygen escalation fires
at +0.15 (not +0.20) and S/F at 250 (not 235). On the same feed it must therefore flag at
least as often for each of those rules (for the band: at medium or higher, since its low
threshold is the same 300). Every flag is advisory: clinicians decide.
"""

from __future__ import annotations

import html
import json
from collections.abc import Iterator
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from monitor.config import load_config
from monitor.demo import FEED_DIR, FEEDS
from monitor.engine.model import ADVISORY, Derivation, FiO2Source, Specimen
from monitor.engine.rules import (
    AaRiseRule,
    OxygenationBandRule,
    OxygenEscalationRule,
    PfFallRule,
    SfLowRule,
)
from monitor.ingest import SourceContext
from monitor.replay import ReplayResult, replay
from monitor.report import compare, first_worsening, write_report
from tests.e2e.test_replay import gasgap

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "fixtures" / "site-example.toml"
STRICT = ROOT / "fixtures" / "site-strict.toml"
PATHS = [FEED_DIR / f for f in FEEDS]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def run(config_path: Path) -> ReplayResult:
    config = load_config(config_path)
    context = SourceContext(site_tz=config.zone(), patient_id_system=config.site.patient_id_system)
    return replay(PATHS, config.to_pipeline_settings(), context, label=config_path.name)


@pytest.fixture(scope="module")
def pair() -> Iterator[tuple[ReplayResult, ReplayResult]]:
    a, b = run(EXAMPLE), run(STRICT)
    yield a, b
    a.close()
    b.close()


def test_report_writes_a_page_and_plots(
    pair: tuple[ReplayResult, ReplayResult], tmp_path: Path
) -> None:
    a, b = pair
    page = write_report(a, tmp_path / "report", comparison=compare(a, b))
    text = page.read_text(encoding="utf-8")
    assert text.startswith("<!doctype html>")
    assert html.escape(ADVISORY) in text
    assert "first worsening gas" in text
    pngs = sorted(page.parent.glob("*.png"))
    names = {p.name for p in pngs}
    assert {"flags-per-patient-day.png", "time-to-flag.png", "retracted.png"} <= names
    # one plot per patient: twelve invented patients in the scenario
    assert len([n for n in names if n.startswith("patient-")]) == 12
    for png in pngs:
        data = png.read_bytes()
        assert data.startswith(PNG_MAGIC) and len(data) > 10_000, png.name
        assert f"src='{png.name}'" in text  # every plot is shown, from beside the page
    assert "<script" not in text  # nothing runs; opens from disk


def test_comparison_strict_is_at_least_as_watchful(pair: tuple[ReplayResult, ReplayResult]) -> None:
    a, b = pair
    c = compare(a, b)

    def rate(rates: dict[tuple[str, str], float], rule: str, priorities: set[str]) -> float:
        return sum(v for (r, p), v in rates.items() if r == rule and p in priorities)

    everything = {"low", "medium", "high"}
    for rule in ("pf-fall", "aa-room-air", "aa-rise", "oxygen-escalation", "sf-low"):
        assert rate(c.second, rule, everything) >= rate(c.first, rule, everything), rule
    assert rate(c.second, "oxygenation-band", {"medium", "high"}) >= rate(
        c.first, "oxygenation-band", {"medium", "high"}
    )
    # a stricter rule never raises a flag it shares with the example later
    for t in c.timing:
        if t.rule != "oxygenation-band":  # the band's raise is at the same low threshold
            assert t.minutes <= 0, (t.patient, t.rule, t.minutes)


def test_compare_in_json(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    assert (
        gasgap(
            [
                "replay",
                *map(str, PATHS),
                "--config",
                str(EXAMPLE),
                "--compare",
                str(STRICT),
                "--json",
                "--report",
                str(tmp_path / "r"),
            ]
        )
        == 0
    )
    data = json.loads(capsys.readouterr().out)
    comparison = data["comparison"]
    assert comparison["first"].endswith("site-example.toml")
    assert comparison["second"].endswith("site-strict.toml")
    for row in comparison["flags_per_patient_day"]:
        assert row["difference"] == pytest.approx(row["second"] - row["first"], abs=1e-3)
    for t in comparison["timing"]:
        assert set(t) == {"patient", "rule", "first_at", "second_at", "minutes_later"}
    assert (tmp_path / "r" / "index.html").is_file()


def test_compare_text_side_by_side(capsys: pytest.CaptureFixture[str]) -> None:
    late = str(FEED_DIR / "feed-late.hl7")
    assert gasgap(["replay", late, "--config", str(EXAMPLE), "--compare", str(STRICT)]) == 0
    out = capsys.readouterr().out
    assert "flags per patient-day" in out and ADVISORY in out


# --- the definition of the first worsening gas, on hand-made gases --------------------------

T0 = datetime(2026, 3, 2, 8, 0, tzinfo=timezone(timedelta(hours=2)))


def gas(hours: float, *, pf: float, aa: float = 30.0, fio2: float = 0.4) -> Derivation:
    return Derivation(
        patient_key="HGH-9999",
        sample_id=f"s{hours}",
        drawn_at=T0 + timedelta(hours=hours),
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=pf * fio2,
        fio2=fio2,
        fio2_source=FiO2Source.WITH_GAS,
        pf_ratio=pf,
        aa_gradient=aa,
        # PAO2 = PaO2 + A-a, and a/A = PaO2 / PAO2 (definitions; reference sheet s.4)
        alveolar_po2=pf * fio2 + aa,
        arterial_alveolar_ratio=(pf * fio2) / (pf * fio2 + aa),
    )


def test_first_worsening_gas_for_a_threshold_rule() -> None:
    # P/F 320 (above 300), then 290, 250, 180: the flag raised on the 180 gas (medium)
    # started with the 290 gas, the first at or below the low threshold.
    gases = [gas(0, pf=320), gas(4, pf=290), gas(8, pf=250), gas(12, pf=180)]
    assert first_worsening(OxygenationBandRule(), gases, "s12") == T0 + timedelta(hours=4)


def test_first_worsening_gas_for_trend_rules() -> None:
    gases = [
        gas(0, pf=300, aa=40),
        gas(4, pf=310, aa=35),
        gas(8, pf=280, aa=50),
        gas(12, pf=200, aa=80),
    ]
    # P/F fell from the 4 h gas on: the 8 h gas is the first that moved down
    assert first_worsening(PfFallRule(), gases, "s12") == T0 + timedelta(hours=8)
    assert first_worsening(AaRiseRule(), gases, "s12") == T0 + timedelta(hours=8)
    assert first_worsening(PfFallRule(), gases, "missing") is None


# --- the report asks the rules (monitor.engine.rules), it does not judge again ----------


def estimate(minutes: float, *, sf: float) -> Derivation:
    return Derivation(
        patient_key="HGH-9999",
        sample_id=f"e{minutes}",
        drawn_at=T0 + timedelta(minutes=minutes),
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=None,
        fio2=0.4,
        fio2_source=FiO2Source.WITH_GAS,
        spo2=sf * 0.4,
        sf_ratio=sf,
        estimated=True,
    )


def test_a_gradient_rise_at_another_fio2_does_not_count() -> None:
    # The A–a rule compares gradients only at a comparable FiO2 (within 0.05; the normal
    # gradient grows with FiO2, reference sheet section 4). A rise from a gas at FiO2
    # 0.30 to one at 0.40 is not a worsening for that rule, so the run starts at 8 h.
    gases = [
        gas(0, pf=300, aa=20, fio2=0.30),
        gas(4, pf=300, aa=30, fio2=0.40),
        gas(8, pf=300, aa=50, fio2=0.40),
        gas(12, pf=300, aa=90, fio2=0.40),
    ]
    assert first_worsening(AaRiseRule(), gases, "s12") == T0 + timedelta(hours=8)


def test_oxygen_escalation_run_follows_the_fio2() -> None:
    gases = [
        gas(0, pf=300, fio2=0.40),
        gas(2, pf=280, fio2=0.30),
        gas(4, pf=260, fio2=0.35),
        gas(6, pf=240, fio2=0.50),
        gas(8, pf=220, fio2=0.60),
    ]
    # FiO2 0.30 -> 0.35 -> 0.50 -> 0.60 rose at every gas from 4 h on (0.40 -> 0.30 fell)
    assert first_worsening(OxygenEscalationRule(), gases, "s8") == T0 + timedelta(hours=4)


def test_sf_run_counts_readings_at_or_below_the_threshold() -> None:
    # S/F 235 (Rice et al., Chest 2007): 250 is above, 230 and 220 at or below.
    readings = [
        estimate(0, sf=250),
        estimate(20, sf=230),
        estimate(40, sf=220),
        estimate(60, sf=210),
    ]
    assert first_worsening(SfLowRule(), readings, "e60") == T0 + timedelta(minutes=20)


def test_a_venous_gas_breaks_the_run() -> None:
    # the rules judge nothing on a non-arterial sample, so it cannot start a run
    venous = Derivation(
        patient_key="HGH-9999",
        sample_id="s4",
        drawn_at=T0 + timedelta(hours=4),
        specimen=Specimen.VENOUS,
        equation="full",
        pao2=100,
        fio2=0.4,
        fio2_source=FiO2Source.WITH_GAS,
        pf_ratio=250,
    )
    gases = [gas(0, pf=280), venous, gas(8, pf=250), gas(12, pf=180)]
    assert first_worsening(OxygenationBandRule(), gases, "s12") == T0 + timedelta(hours=8)
