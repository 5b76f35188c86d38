"""The six flag rules, each at, just inside and just outside its thresholds.

Provenance of the thresholds (the project's reference page, docs/reference.md):
- P/F bands 300/200/100 mmHg: Berlin definition, ARDS Definition Task Force, JAMA
  2012;307:2526-2533 (section 5).
- Altitude check value: measured P/F 150 at PB 626.5 mmHg (ISA, 1600 m) is 182.0
  once scaled by 760/PB (section 5, "Check values at 1600 m").
- S/F 235 corresponds to P/F 200: Rice TW et al., Chest 2007 (section 6).
- P/F fall 25 %, A-a 10 mmHg over age-normal, A-a rise 20 mmHg, FiO2 rise 0.20 in 6 h,
  two S/F readings 15 min apart: common practice, no source (the issue's numbers).
"""

from dataclasses import replace
from datetime import UTC, datetime, timedelta

import pytest
from hypothesis import given
from hypothesis import strategies as st

from monitor.engine import physiology
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    Derivation,
    FiO2Source,
    InputUsed,
    Priority,
    QualityFlag,
    Specimen,
)
from monitor.engine.rules import (
    AaRiseRule,
    AaRoomAirRule,
    FiO2Point,
    HypoxaemiaRule,
    OxygenationBandRule,
    OxygenEscalationRule,
    PatientHistory,
    PfFallRule,
    RuleSet,
    SfLowRule,
    default_rules,
    evaluate,
)

T0 = datetime(2026, 3, 4, 6, 10, tzinfo=UTC)
NOW = T0 + timedelta(days=2)
NO_HISTORY = PatientHistory()


def gas(at: datetime = T0, **kw: object) -> Derivation:
    """An invented arterial gas derivation for patient 'HGH-0042'."""
    values: dict[str, object] = dict(
        patient_key="urn:oid:2.999.1.1.1|HGH-0042",
        sample_id=f"pao2-{at.isoformat()}",
        drawn_at=at,
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=90.0,
        fio2=0.5,
        fio2_source=FiO2Source.CHARTED,
    )
    values.update(kw)
    return Derivation(**values)  # type: ignore[arg-type]


def spo2_estimate(at: datetime, sf: float | None) -> Derivation:
    return gas(
        at,
        sample_id=f"spo2-{at.isoformat()}",
        specimen=Specimen.UNKNOWN,
        pao2=None,
        sf_ratio=sf,
        estimated=True,
        flags=frozenset({QualityFlag.ESTIMATED_FROM_SPO2}),
    )


def only(rule: object, d: Derivation, history: PatientHistory = NO_HISTORY, now: datetime = NOW):
    outcomes = evaluate(RuleSet(rules=(rule,)), d, history, now)  # type: ignore[arg-type]
    assert len(outcomes) == 1
    return outcomes[0]


# --- rule 1: oxygenation band ----------------------------------------------------------

BAND = OxygenationBandRule()


@pytest.mark.parametrize(
    ("pf", "priority", "label"),
    [
        (300.1, None, None),  # just above mild (Berlin: 200 < P/F <= 300)
        (300.0, Priority.LOW, "P/F <= 300"),
        (299.9, Priority.LOW, "P/F <= 300"),
        (200.1, Priority.LOW, "P/F <= 300"),
        (200.0, Priority.MEDIUM, "P/F <= 200"),  # moderate: 100 < P/F <= 200
        (199.9, Priority.MEDIUM, "P/F <= 200"),
        (100.1, Priority.MEDIUM, "P/F <= 200"),
        (100.0, Priority.HIGH, "P/F <= 100"),  # severe: P/F <= 100
        (99.9, Priority.HIGH, "P/F <= 100"),
    ],
)
def test_band_rule_follows_berlin_thresholds_without_peep(pf, priority, label):
    outcome = only(BAND, gas(pf_ratio=pf))
    assert outcome.fired is (priority is not None)
    assert outcome.priority == priority
    if label:
        assert outcome.label == label


@pytest.mark.parametrize(
    ("pf", "band", "label"),
    [
        (250.0, "mild", "Berlin mild"),
        (150.0, "moderate", "Berlin moderate"),
        (80.0, "severe", "Berlin severe"),
    ],
)
def test_band_rule_uses_berlin_words_when_peep_is_known(pf, band, label):
    outcome = only(BAND, gas(pf_ratio=pf, peep=8.0, berlin_band=band))
    assert outcome.label == label


def test_berlin_words_not_used_with_site_specific_thresholds():
    rule = OxygenationBandRule(low=300, medium=250, high=150)
    outcome = only(rule, gas(pf_ratio=240.0, peep=8.0, berlin_band="mild"))
    assert outcome.priority is Priority.MEDIUM
    assert outcome.label == "P/F <= 250"


def test_band_rule_uses_altitude_adjusted_pf_at_1600_m():
    # Reference sheet section 5: P/F 150 at PB 626.5 -> 182.0 (ratio x 760/PB).
    assert physiology.pf_ratio_altitude_adjusted(150.0, 626.5) == pytest.approx(182.0, abs=0.05)
    d = gas(pao2=75.0, fio2=0.5, pf_ratio=150.0, pf_ratio_adjusted=182.0, barometric_pressure=626.5)
    outcome = only(BAND, d)
    assert outcome.priority is Priority.MEDIUM  # not HIGH: 182 > 100, and <= 200
    assert outcome.label == "P/F <= 200"
    assert outcome.numbers["adjusted"] is True
    assert outcome.numbers["pf"] == 182.0
    assert outcome.numbers["pf_measured"] == 150.0


def test_band_rule_clears_only_above_threshold_plus_hysteresis():
    # 10 % over the low threshold of 300 is 330 (hysteresis: common practice, no source).
    assert only(BAND, gas(pf_ratio=330.0)).cleared is False
    assert only(BAND, gas(pf_ratio=330.5)).cleared is True
    in_margin = only(BAND, gas(pf_ratio=310.0))
    assert not in_margin.fired and not in_margin.cleared


def test_band_rule_without_pf_cannot_judge():
    outcome = only(BAND, gas(pf_ratio=None))
    assert not outcome.fired and not outcome.cleared
    assert "no P/F" in outcome.reason


# --- the shared guards -----------------------------------------------------------------


@pytest.mark.parametrize("flag", [QualityFlag.PAO2_ABOVE_ALVEOLAR, QualityFlag.NOT_ARTERIAL])
def test_no_rule_fires_on_an_unreliable_derivation(flag):
    d = gas(pf_ratio=60.0, fio2=0.9, aa_gradient=500.0, flags=frozenset({flag}))
    history = PatientHistory(
        derivations=[gas(T0 - timedelta(hours=2), pf_ratio=400.0, fio2=0.9, aa_gradient=100.0)],
        fio2_points=[FiO2Point(T0 - timedelta(hours=3), 0.21)],
    )
    outcomes = evaluate(default_rules(), d, history, NOW)
    assert outcomes, "every applicable rule still answers"
    assert not any(o.fired or o.cleared for o in outcomes)
    assert all("unreliable" in o.reason for o in outcomes)


@pytest.mark.parametrize("specimen", [Specimen.VENOUS, Specimen.CAPILLARY, Specimen.UNKNOWN])
def test_no_rule_fires_on_a_non_arterial_sample(specimen):
    d = gas(pf_ratio=60.0, specimen=specimen)
    outcomes = evaluate(default_rules(), d, NO_HISTORY, NOW)
    assert outcomes and not any(o.fired or o.cleared for o in outcomes)
    assert all("not an arterial sample" in o.reason for o in outcomes)


def test_preliminary_inputs_mark_the_flag_preliminary():
    d = gas(pf_ratio=150.0, preliminary=True)
    assert only(BAND, d).preliminary is True
    flagged = gas(pf_ratio=150.0, flags=frozenset({QualityFlag.PRELIMINARY_INPUTS}))
    assert only(BAND, flagged).preliminary is True
    assert only(BAND, gas(pf_ratio=150.0)).preliminary is False


def test_disabled_rules_give_no_outcome():
    rules = RuleSet(rules=(OxygenationBandRule(enabled=False), PfFallRule()))
    outcomes = evaluate(rules, gas(pf_ratio=50.0), NO_HISTORY, NOW)
    assert [o.rule_id for o in outcomes] == ["pf-fall"]


def test_default_rules_are_the_six_of_the_issue_and_hypoxaemia():
    ids = [r.rule_id for r in default_rules().rules]
    assert ids == [
        "oxygenation-band",
        "pf-fall",
        "aa-room-air",
        "aa-rise",
        "oxygen-escalation",
        "sf-low",
        "hypoxaemia",
    ]


def test_now_must_be_timezone_aware():
    with pytest.raises(InvalidInput, match="now"):
        evaluate(default_rules(), gas(), NO_HISTORY, datetime(2026, 3, 4))


def test_history_after_now_is_not_used():
    later = gas(T0 + timedelta(hours=1), pf_ratio=400.0)
    d = gas(T0 + timedelta(hours=2), pf_ratio=200.0)
    outcome = only(
        PfFallRule(),
        d,
        PatientHistory(derivations=[later, gas(pf_ratio=350.0)]),
        now=T0 + timedelta(minutes=30),
    )
    assert outcome.numbers["best_pf"] == 350.0


def test_rule_specs_reject_bad_thresholds():
    with pytest.raises(InvalidInput, match="fall_fraction"):
        PfFallRule(fall_fraction=-0.1)
    with pytest.raises(InvalidInput, match="must fall"):
        OxygenationBandRule(low=200, medium=300, high=100)
    with pytest.raises(InvalidInput, match="unique"):
        RuleSet(rules=(PfFallRule(), PfFallRule()))
    with pytest.raises(InvalidInput, match="hysteresis"):
        RuleSet(rules=(), hysteresis=1.5)


# --- rule 2: P/F fall ------------------------------------------------------------------

FALL = PfFallRule()


def fall_history(best: float = 400.0) -> PatientHistory:
    return PatientHistory(
        derivations=[
            gas(T0 - timedelta(hours=20), pf_ratio=best),
            gas(T0 - timedelta(hours=8), pf_ratio=best - 50.0),
        ]
    )


@pytest.mark.parametrize(
    ("pf", "fired"),
    [(300.0, True), (299.0, True), (301.0, False)],  # 25 % below the best (400) is 300
)
def test_pf_fall_fires_at_25_percent_below_the_best_of_24_h(pf, fired):
    outcome = only(FALL, gas(pf_ratio=pf), fall_history())
    assert outcome.fired is fired
    assert outcome.numbers["best_pf"] == 400.0
    if fired:
        assert outcome.priority is Priority.MEDIUM


def test_pf_fall_reports_the_change_with_its_times():
    # Invented example: 182 after a best of 290 is a fall of 37.2 % ((290-182)/290).
    history = PatientHistory(derivations=[gas(T0, pf_ratio=290.0)])
    d = gas(T0 + timedelta(hours=4), pf_ratio=182.0)
    outcome = only(FALL, d, history)
    assert outcome.fired
    assert outcome.numbers["change_percent"] == pytest.approx(-37.2, abs=0.05)
    assert outcome.numbers["best_pf_at"] == T0.isoformat()


def test_pf_fall_at_altitude_gives_the_measured_value_too():
    # Issue 12 point 5: "adjusted for altitude (measured N)" needs the measured N.
    history = PatientHistory(derivations=[gas(T0, pf_ratio=290.0, barometric_pressure=626.5)])
    d = gas(T0 + timedelta(hours=4), pf_ratio=182.0, barometric_pressure=626.5)
    outcome = only(FALL, d, history)
    assert outcome.numbers["adjusted"] is True and outcome.numbers["pf_measured"] == 182.0
    assert outcome.numbers["pf"] == pytest.approx(182.0 * 760 / 626.5, abs=0.05)


def test_pf_fall_ignores_gases_older_than_24_h():
    history = PatientHistory(
        derivations=[
            gas(T0 - timedelta(hours=24, minutes=1), pf_ratio=500.0),
            gas(T0 - timedelta(hours=23), pf_ratio=320.0),
        ]
    )
    outcome = only(FALL, gas(pf_ratio=250.0), history)
    assert outcome.numbers["best_pf"] == 320.0
    assert not outcome.fired  # 250 is 21.9 % below 320


def test_pf_fall_needs_a_prior_gas():
    outcome = only(FALL, gas(pf_ratio=100.0))
    assert not outcome.fired and outcome.reason


def test_pf_fall_ignores_unreliable_and_venous_history():
    history = PatientHistory(
        derivations=[
            gas(T0 - timedelta(hours=2), pf_ratio=500.0, specimen=Specimen.VENOUS),
            gas(
                T0 - timedelta(hours=3),
                pf_ratio=500.0,
                flags=frozenset({QualityFlag.PAO2_ABOVE_ALVEOLAR}),
            ),
            gas(T0 - timedelta(hours=4), pf_ratio=300.0),
        ]
    )
    outcome = only(FALL, gas(pf_ratio=240.0), history)
    assert outcome.numbers["best_pf"] == 300.0
    assert not outcome.fired  # 20 % fall


def test_pf_fall_clears_below_hysteresis():
    # 0.25 x (1 - 0.10) = 22.5 %: a fall of 20 % clears, 24 % is in the margin.
    assert only(FALL, gas(pf_ratio=320.0), fall_history()).cleared is True
    margin = only(FALL, gas(pf_ratio=304.0), fall_history())
    assert not margin.fired and not margin.cleared


def test_pf_fall_on_a_preliminary_best_is_preliminary():
    history = PatientHistory(
        derivations=[gas(T0 - timedelta(hours=1), pf_ratio=400.0, preliminary=True)]
    )
    assert only(FALL, gas(pf_ratio=200.0), history).preliminary is True


# --- rule 3: A-a on room air -----------------------------------------------------------

ROOM = AaRoomAirRule()


def room_air(aa: float, expected: float = 17.5, **kw: object) -> Derivation:
    # expected 17.5 = (60 + 10) / 4 at age 60, StatPearls (reference sheet section 4).
    values: dict[str, object] = dict(
        fio2=0.21,
        fio2_source=FiO2Source.ROOM_AIR,
        aa_gradient=aa,
        aa_gradient_expected=expected,
        age_years=60.0,
    )
    values.update(kw)
    return gas(**values)


@pytest.mark.parametrize(("aa", "fired"), [(27.5, False), (27.6, True), (27.4, False)])
def test_aa_room_air_fires_only_when_more_than_10_above_normal(aa, fired):
    outcome = only(ROOM, room_air(aa))
    assert outcome.fired is fired
    if fired:
        assert outcome.priority is Priority.LOW


def test_aa_room_air_has_no_opinion_on_oxygen():
    outcome = only(ROOM, room_air(60.0, fio2=0.4))
    assert not outcome.fired and "room air" in outcome.reason


def test_aa_room_air_needs_the_expected_value():
    outcome = only(ROOM, room_air(60.0, expected=None))
    assert not outcome.fired and outcome.reason


def test_aa_room_air_clears_below_hysteresis():
    assert only(ROOM, room_air(17.5 + 8.9)).cleared is True
    assert only(ROOM, room_air(17.5 + 9.5)).cleared is False


# --- rule 4: A-a rise ------------------------------------------------------------------

RISE = AaRiseRule()

#: Alveolar PO2 at PB 760, PH2O 47, PaCO2 40, R 0.8, full form: 0.50 -> 311.50 (sheet s.1
#: table); 0.35 and 0.80 worked by hand from the sheet's formula, PIO2 - PaCO2 x [FiO2 +
#: (1 - FiO2)/R]: 0.35 x 713 - 40 x 1.1625 = 203.05; 0.80 x 713 - 40 x 1.05 = 528.40.
PAO2_AT = {0.35: 203.05, 0.45: 275.35, 0.5: 311.50, 0.55: 347.65, 0.8: 528.40}


def aa_gas(aa: float, fio2: float = 0.5, at: datetime = T0, **kw: object) -> Derivation:
    """A gas whose A-a and a/A agree with its alveolar PO2 (a/A = (PAO2 - A-a)/PAO2)."""
    alveolar = PAO2_AT[fio2]
    return gas(
        at,
        fio2=fio2,
        alveolar_po2=alveolar,
        aa_gradient=aa,
        pao2=alveolar - aa,
        arterial_alveolar_ratio=(alveolar - aa) / alveolar,
        **kw,
    )


def rise_history(aa: float = 100.0, fio2: float = 0.5, hours: float = 4) -> PatientHistory:
    return PatientHistory(derivations=[aa_gas(aa, fio2, T0 - timedelta(hours=hours))])


def test_aa_rise_at_a_steady_high_fio2_is_not_fired_by_noise():
    # Issue 12 point 6: FiO2 0.80, A-a 408 -> 428 (+20 mmHg, 5 %): a/A 0.228 -> 0.190.
    outcome = only(RISE, aa_gas(428.0, 0.8), rise_history(408.0, 0.8))
    assert outcome.numbers["aa_rise"] == 20.0
    assert outcome.numbers["aa_ratio_fall"] == pytest.approx(0.038, abs=0.001)
    assert not outcome.fired


@pytest.mark.parametrize(
    ("fio2", "before", "after", "fired"),
    [
        (0.8, 408.0, 451.0, True),  # a/A falls 43/528.4 = 0.081
        (0.8, 408.0, 450.0, False),  # 42/528.4 = 0.0795
        (0.35, 100.0, 120.0, True),  # a real fall at 0.35: 20/203.05 = 0.098
        (0.35, 100.0, 119.9, False),  # under 20 mmHg
        (0.35, 60.0, 76.0, False),  # a/A down 0.079 but only 16 mmHg
        (0.5, 100.0, 125.0, True),  # 25/311.5 = 0.080
        (0.5, 100.0, 124.0, False),  # 24/311.5 = 0.077
        (0.5, 100.0, 120.0, False),  # 20 mmHg at 0.50 is 0.064 of a/A: not enough
    ],
)
def test_aa_rise_needs_20_mmhg_and_an_aa_ratio_fall_of_008(fio2, before, after, fired):
    # 20 mmHg and 0.08: common practice, no source; a/A stable across FiO2 (Gilbert and
    # Keighley 1974, from memory; sheet s.5).
    outcome = only(RISE, aa_gas(after, fio2), rise_history(before, fio2))
    assert outcome.fired is fired
    if fired:
        assert outcome.priority is Priority.MEDIUM


@pytest.mark.parametrize(("previous_fio2", "judged"), [(0.45, True), (0.55, True)])
def test_aa_rise_compares_fio2_within_005(previous_fio2, judged):
    outcome = only(RISE, aa_gas(200.0, 0.5), rise_history(100.0, previous_fio2))
    assert outcome.fired is judged


def test_aa_rise_does_not_compare_across_fio2_beyond_005():
    history = PatientHistory(derivations=[aa_gas(100.0, 0.35, T0 - timedelta(hours=4))])
    outcome = only(RISE, aa_gas(200.0, 0.5), history)
    assert not outcome.fired and "comparable FiO2" in outcome.reason


@pytest.mark.parametrize(("hours", "judged"), [(11.9, True), (12.0, True), (12.1, False)])
def test_aa_rise_looks_back_12_h(hours, judged):
    outcome = only(RISE, aa_gas(140.0), rise_history(hours=hours))
    assert outcome.fired is judged


def test_aa_rise_compares_with_the_latest_previous_gas():
    history = PatientHistory(
        derivations=[
            aa_gas(80.0, at=T0 - timedelta(hours=6)),
            aa_gas(115.0, at=T0 - timedelta(hours=2)),
        ]
    )
    outcome = only(RISE, aa_gas(130.0), history)
    assert outcome.numbers["previous_aa"] == 115.0
    assert not outcome.fired


def test_aa_rise_skips_a_gas_at_another_fio2_for_the_latest_comparable_one():
    history = PatientHistory(
        derivations=[
            aa_gas(90.0, 0.5, T0 - timedelta(hours=6)),
            aa_gas(200.0, 0.8, T0 - timedelta(hours=2)),
        ]
    )
    outcome = only(RISE, aa_gas(120.0, 0.5), history)
    assert outcome.numbers["previous_aa"] == 90.0
    assert outcome.fired  # +30 mmHg, a/A -0.096 at the same FiO2


def test_aa_rise_clears_below_either_threshold_less_hysteresis():
    # 0.08 x 0.9 = 0.072 of a/A; 20 x 0.9 = 18 mmHg.
    assert only(RISE, aa_gas(430.0, 0.8), rise_history(408.0, 0.8)).cleared is True
    margin = only(RISE, aa_gas(447.0, 0.8), rise_history(408.0, 0.8))  # 0.0738
    assert not margin.fired and not margin.cleared


def test_trend_rules_do_not_compare_gases_on_an_estimated_fio2():
    # Device-and-flow FiO2 scatters by 0.04-0.15 (reference sheet section 8, Wettstein 2005).
    estimated = frozenset({QualityFlag.ESTIMATED_FIO2})
    history = PatientHistory(
        derivations=[
            gas(T0 - timedelta(hours=3), pf_ratio=450.0, aa_gradient=40.0, flags=estimated),
        ]
    )
    assert not only(FALL, gas(pf_ratio=200.0, aa_gradient=100.0), history).fired
    assert not only(RISE, gas(pf_ratio=200.0, aa_gradient=100.0), history).fired
    assert not only(FALL, gas(pf_ratio=200.0, flags=estimated), fall_history()).fired


# --- rule 5: oxygen escalation ---------------------------------------------------------

ESC = OxygenEscalationRule()


@pytest.mark.parametrize(("fio2", "fired"), [(0.41, True), (0.40, False), (0.42, True)])
def test_oxygen_escalation_fires_at_a_rise_of_020(fio2, fired):
    # Lowest FiO2 in the window 0.21; the gas reports fio2 in effect at the draw.
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=5), 0.21)])
    outcome = only(ESC, gas(fio2=fio2), history)
    assert outcome.fired is fired
    assert outcome.numbers["fio2_lowest"] == 0.21


def test_oxygen_escalation_counts_the_fio2_in_effect_at_the_window_start():
    history = PatientHistory(
        fio2_points=[
            FiO2Point(T0 - timedelta(hours=8), 0.21),
            FiO2Point(T0 - timedelta(hours=1), 0.35),
        ]
    )
    outcome = only(ESC, gas(fio2=0.45), history)
    assert outcome.fired  # 0.21 was still in effect 6 h ago


def test_oxygen_escalation_ignores_changes_before_the_window():
    history = PatientHistory(
        fio2_points=[
            FiO2Point(T0 - timedelta(hours=9), 0.21),
            FiO2Point(T0 - timedelta(hours=7), 0.40),
        ]
    )
    outcome = only(ESC, gas(fio2=0.45), history)
    assert not outcome.fired and outcome.cleared


def test_oxygen_escalation_is_marked_estimated_only_when_the_fio2_was():
    # Judged on an SpO2 reading between gases, but with a charted FiO2: the rise itself
    # is measured, so the flag is not "estimated"; from device and flow it is.
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=5), 0.40)])
    charted = replace(spo2_estimate(T0, 200.0), fio2=0.75)
    assert only(ESC, charted, history).fired
    assert only(ESC, charted, history).estimated is False
    from_device = replace(
        charted,
        fio2_source=FiO2Source.DEVICE_ESTIMATE,
        flags=charted.flags | {QualityFlag.ESTIMATED_FIO2},
    )
    assert only(ESC, from_device, history).estimated is True


def test_oxygen_escalation_without_any_fio2_cannot_judge():
    outcome = only(ESC, gas(fio2=None, fio2_source=FiO2Source.UNKNOWN))
    assert not outcome.fired and outcome.reason


# --- rule 6: S/F from SpO2 -------------------------------------------------------------

SF = SfLowRule()


@pytest.mark.parametrize(("sf", "fired"), [(235.0, True), (234.9, True), (235.1, False)])
def test_sf_low_fires_at_235_on_two_readings(sf, fired):
    # S/F 235 <-> P/F 200: Rice et al., Chest 2007 (reference sheet section 6).
    history = PatientHistory(estimated=[spo2_estimate(T0 - timedelta(minutes=20), 230.0)])
    outcome = only(SF, spo2_estimate(T0, sf), history)
    assert outcome.fired is fired
    if fired:
        assert outcome.priority is Priority.LOW
    assert outcome.estimated is True


def test_sf_low_needs_a_second_low_reading():
    assert not only(SF, spo2_estimate(T0, 200.0)).fired


@pytest.mark.parametrize(("minutes", "fired"), [(15, True), (14, False)])
def test_sf_low_readings_must_be_15_minutes_apart(minutes, fired):
    history = PatientHistory(estimated=[spo2_estimate(T0 - timedelta(minutes=minutes), 200.0)])
    assert only(SF, spo2_estimate(T0, 200.0), history).fired is fired


def test_sf_low_is_silent_when_an_arterial_gas_was_drawn_in_6_h():
    history = PatientHistory(
        estimated=[spo2_estimate(T0 - timedelta(minutes=30), 200.0)],
        derivations=[gas(T0 - timedelta(hours=5), pf_ratio=180.0)],
    )
    outcome = only(SF, spo2_estimate(T0, 200.0), history)
    assert not outcome.fired and "arterial" in outcome.reason


def test_sf_low_fires_when_the_last_gas_is_older_than_6_h():
    history = PatientHistory(
        estimated=[spo2_estimate(T0 - timedelta(minutes=30), 200.0)],
        derivations=[gas(T0 - timedelta(hours=7), pf_ratio=180.0)],
    )
    assert only(SF, spo2_estimate(T0, 200.0), history).fired


def test_sf_low_is_not_applied_to_arterial_gases():
    outcomes = evaluate(RuleSet(rules=(SF,)), gas(sf_ratio=150.0), NO_HISTORY, NOW)
    assert outcomes == []


def test_sf_low_clears_above_235_plus_hysteresis():
    assert only(SF, spo2_estimate(T0, 259.0)).cleared is True  # > 258.5
    assert only(SF, spo2_estimate(T0, 258.0)).cleared is False


def test_sf_low_without_sf_cannot_judge():
    # S/F is None when SpO2 is above 97 % (Rice 2007; reference sheet section 6).
    outcome = only(SF, spo2_estimate(T0, None))
    assert not outcome.fired and "97" in outcome.reason


def test_rules_are_frozen_values():
    with pytest.raises(AttributeError):
        BAND.low = 250.0  # type: ignore[misc]
    assert replace(BAND, low=280.0).low == 280.0


# --- properties ------------------------------------------------------------------------

pf_values = st.floats(min_value=5.0, max_value=3800.0, allow_nan=False)


@given(pf_values, pf_values)
def test_a_lower_pf_never_gives_a_lower_band_priority(a, b):
    low, high = sorted((a, b))

    def rank(pf: float) -> int:
        outcome = only(BAND, gas(pf_ratio=pf))
        return outcome.priority.rank if outcome.priority else 0

    assert rank(low) >= rank(high)


@given(pf_values, st.floats(min_value=0.0, max_value=0.99), st.floats(min_value=5, max_value=800))
def test_an_outcome_is_never_both_fired_and_cleared(pf, hysteresis, aa):
    rules = RuleSet(rules=default_rules().rules, hysteresis=hysteresis)
    history = PatientHistory(
        derivations=[gas(T0 - timedelta(hours=3), pf_ratio=400.0, aa_gradient=60.0)]
    )
    for outcome in evaluate(rules, gas(pf_ratio=pf, aa_gradient=aa), history, NOW):
        assert not (outcome.fired and outcome.cleared)
        assert (outcome.priority is not None) is outcome.fired


@given(pf_values, st.sampled_from([QualityFlag.PAO2_ABOVE_ALVEOLAR, QualityFlag.NOT_ARTERIAL]))
def test_nothing_fires_on_unreliable_data_whatever_the_numbers(pf, flag):
    d = gas(pf_ratio=pf, aa_gradient=400.0, fio2=1.0, flags=frozenset({flag}))
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=1), 0.21)])
    assert not any(o.fired for o in evaluate(default_rules(), d, history, NOW))


# --- issue 12, point 5: which P/F counts --------------------------------------------------


@pytest.mark.parametrize(
    ("pb", "priority", "label", "adjusted"),
    [
        # 600 m: ISA 707 mmHg, above 674: P/F 190 stays moderate (Berlin, JAMA 2012).
        (707.0, Priority.MEDIUM, "Berlin moderate", False),
        (674.0, Priority.MEDIUM, "Berlin moderate", False),
        # just above 1000 m: 190 x 760/673.9 = 214.3, mild
        (673.9, Priority.LOW, "Berlin mild", True),
    ],
)
def test_band_rule_adjusts_for_altitude_only_above_1000_m(pb, priority, label, adjusted):
    d = gas(
        pao2=95.0,
        fio2=0.5,
        pf_ratio=190.0,
        peep=8.0,
        barometric_pressure=pb,
        berlin_band="moderate" if not adjusted else "mild",
        pf_ratio_adjusted=190.0 * 760 / pb,
    )  # even if a stored row says "adjusted"
    outcome = only(BAND, d)
    assert outcome.priority is priority and outcome.label == label
    assert outcome.numbers["adjusted"] is adjusted
    assert ("pf_measured" in outcome.numbers) is adjusted


# --- issue 12, point 2: an estimated FiO2 ---------------------------------------------------

ESTIMATE = dict(
    fio2_source=FiO2Source.DEVICE_ESTIMATE, flags=frozenset({QualityFlag.ESTIMATED_FIO2})
)


def test_band_on_an_estimated_fio2_is_marked_and_held_at_low():
    # Reservoir mask 15 L/min, FiO2 estimated 0.90 (top of 0.60-0.90, sheet s.8 [C]);
    # PaO2 70.2 gives P/F 78; on room air the same PaO2 would be P/F 334.
    d = gas(pao2=70.2, fio2=0.9, pf_ratio=78.0, barometric_pressure=760.0, **ESTIMATE)
    outcome = only(BAND, d)
    assert outcome.fired and outcome.priority is Priority.LOW
    assert outcome.uncertain is True
    assert outcome.numbers["fio2_basis"] == "estimated from device and flow"
    assert outcome.numbers["priority_held"] is True
    assert outcome.label == "P/F <= 100"


def test_band_on_an_estimated_fio2_keeps_what_room_air_makes_certain():
    # PaO2 38 on a 2 L/min cannula (0.28): even on room air P/F would be 181 <= 200.
    d = gas(pao2=38.0, fio2=0.28, pf_ratio=135.7, barometric_pressure=760.0, **ESTIMATE)
    outcome = only(BAND, d)
    assert outcome.priority is Priority.MEDIUM
    assert outcome.numbers["pf_at_room_air"] == pytest.approx(181.0, abs=0.05)


@pytest.mark.parametrize(("pao2", "cleared"), [(141.8, False), (142.0, True)])
def test_a_good_pf_on_an_estimated_fio2_clears_only_at_estimate_plus_015(pao2, cleared):
    # Estimate 0.28 + 0.15 = 0.43 (Wettstein 2005: SD up to 0.15); clears above 330
    # (hysteresis 10 %), i.e. PaO2 above 330 x 0.43 = 141.9. At 0.28 both are "P/F > 500".
    d = gas(pao2=pao2, fio2=0.28, pf_ratio=pao2 / 0.28, barometric_pressure=760.0, **ESTIMATE)
    assert only(BAND, d).cleared is cleared


def test_band_on_a_fio2_charted_after_the_draw_is_held_too():
    d = gas(
        pao2=70.0,
        fio2=0.8,
        pf_ratio=87.5,
        barometric_pressure=760.0,
        fio2_source=FiO2Source.CHARTED_AFTER,
        flags=frozenset({QualityFlag.FIO2_CHARTED_AFTER_DRAW}),
    )
    outcome = only(BAND, d)
    assert outcome.priority is Priority.LOW and outcome.uncertain
    assert outcome.numbers["fio2_basis"] == "charted after the draw"


def test_a_measured_fio2_gives_the_full_priority_and_is_not_uncertain():
    outcome = only(BAND, gas(pao2=70.2, fio2=0.9, pf_ratio=78.0, barometric_pressure=760.0))
    assert outcome.priority is Priority.HIGH and not outcome.uncertain
    assert outcome.numbers["fio2_basis"] == "charted"


# --- issue 12, point 3: FiO2 changed just before the draw ------------------------------------


def changed_gas(**kw: object) -> Derivation:
    """FiO2 0.40 raised to 0.80 five minutes before a PaO2 of 70 (the issue's case):
    pairing hands over 0.40 and the new 0.80 as input ``fio2_set``."""
    return gas(
        pao2=70.0,
        fio2=0.4,
        pf_ratio=175.0,
        barometric_pressure=760.0,
        flags=frozenset({QualityFlag.FIO2_NOT_STEADY}),
        inputs=(InputUsed("fio2_set", 0.8, "set 5 min before", None, T0 - timedelta(minutes=5)),),
        **kw,
    )


def test_band_judges_on_the_fio2_the_blood_reflects_and_shows_both():
    outcome = only(BAND, changed_gas())
    assert outcome.priority is Priority.MEDIUM  # 70/0.40 = 175, not 70/0.80 = 88
    assert outcome.numbers["pf"] == 175.0
    assert outcome.numbers["pf_on_fio2_set"] == 87.5
    assert outcome.numbers["fio2_set"] == 0.8 and outcome.numbers["fio2_set_minutes"] == 5


def test_oxygen_escalation_sees_the_fio2_set_not_the_one_reflected():
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=2), 0.4)])
    outcome = only(ESC, changed_gas(), history)
    assert outcome.fired and outcome.numbers["fio2"] == 0.8


# --- issue 12, point 8: hypoxaemia with FiO2 unknown -----------------------------------------

HYPOX = HypoxaemiaRule()
UNKNOWN = dict(
    fio2=None,
    fio2_source=FiO2Source.UNKNOWN,
    pf_ratio=None,
    flags=frozenset({QualityFlag.FIO2_UNKNOWN}),
)


@pytest.mark.parametrize(
    ("pao2", "priority"),
    [(60.0, None), (59.9, Priority.LOW), (40.0, Priority.LOW), (39.9, Priority.MEDIUM)],
)
def test_a_low_pao2_with_fio2_unknown_flags_on_its_own(pao2, priority):
    # PaO2 < 60 mmHg: hypoxaemic respiratory failure (textbook, from memory); < 40:
    # P/F <= 190 even on room air (Berlin moderate).
    outcome = only(HYPOX, gas(pao2=pao2, **UNKNOWN))
    assert outcome.priority is priority
    if priority:
        assert outcome.numbers["fio2_basis"] == "unknown"
        assert "FiO2 unknown" in outcome.label


@pytest.mark.parametrize(
    ("sao2", "priority"),
    [(90.0, None), (89.9, Priority.LOW), (75.0, Priority.LOW), (74.9, Priority.MEDIUM)],
)
def test_a_low_sao2_with_fio2_unknown_flags_too(sao2, priority):
    # SaO2 90 % and 75 % are PaO2 60 and 40 on Severinghaus Eq. 1 (sheet s.7: 0.906, 0.749).
    assert physiology.so2_from_po2(60.0) == pytest.approx(90.58, abs=0.01)
    assert physiology.so2_from_po2(40.0) == pytest.approx(74.95, abs=0.01)
    d = gas(pao2=65.0, inputs=(InputUsed("sao2", sao2, "same panel"),), **UNKNOWN)
    assert only(HYPOX, d).priority is priority


def test_hypoxaemia_leaves_a_known_fio2_to_the_band_rule_and_clears_on_a_good_pao2():
    low_known = only(HYPOX, gas(pao2=50.0, fio2=0.21, pf_ratio=238.0))
    assert not low_known.fired and not low_known.cleared and "band" in low_known.reason
    assert only(HYPOX, gas(pao2=66.1, fio2=0.21, pf_ratio=315.0)).cleared is True
    assert only(HYPOX, gas(pao2=65.9, **UNKNOWN)).cleared is False  # 60 x 1.1 = 66


def test_the_46_low_gases_of_a_third_party_feed_each_raise_a_flag():
    # Issue 12 point 8: third-party feed, FiO2 never sent; every PaO2 under 60 flags.
    lows = [gas(T0 + timedelta(minutes=10 * i), pao2=58.0 - i * 0.2, **UNKNOWN) for i in range(46)]
    assert all(any(o.fired for o in evaluate(default_rules(), d, NO_HISTORY, NOW)) for d in lows)


# --- issue 12, point 9: the adult age-normal on a child ------------------------------------


def test_aa_room_air_on_a_child_says_it_used_an_adult_formula():
    d = room_air(
        20.0, expected=3.75, age_years=5.0, flags=frozenset({QualityFlag.PAEDIATRIC_AGE_NORMAL})
    )
    outcome = only(ROOM, d)
    assert outcome.fired and "adult formula" in outcome.label
    assert outcome.numbers["adult_formula_age"] == 5.0
