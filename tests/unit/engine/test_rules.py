"""The six flag rules, each at, just inside and just outside its thresholds.

Provenance of the thresholds (reference sheet /work/shared/reference/clinical-reference.md):
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
from monitor.engine.model import Derivation, FiO2Source, Priority, QualityFlag, Specimen
from monitor.engine.rules import (
    AaRiseRule,
    AaRoomAirRule,
    FiO2Point,
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
    [(250.0, "mild", "Berlin mild"), (150.0, "moderate", "Berlin moderate"),
     (80.0, "severe", "Berlin severe")],
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
    d = gas(pao2=75.0, fio2=0.5, pf_ratio=150.0, pf_ratio_adjusted=182.0,
            barometric_pressure=626.5)
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


def test_default_rules_are_the_six_of_the_issue():
    ids = [r.rule_id for r in default_rules().rules]
    assert ids == ["oxygenation-band", "pf-fall", "aa-room-air", "aa-rise",
                   "oxygen-escalation", "sf-low"]


def test_now_must_be_timezone_aware():
    with pytest.raises(InvalidInput, match="now"):
        evaluate(default_rules(), gas(), NO_HISTORY, datetime(2026, 3, 4))


def test_history_after_now_is_not_used():
    later = gas(T0 + timedelta(hours=1), pf_ratio=400.0)
    d = gas(T0 + timedelta(hours=2), pf_ratio=200.0)
    outcome = only(PfFallRule(), d, PatientHistory(derivations=[later, gas(pf_ratio=350.0)]),
                   now=T0 + timedelta(minutes=30))
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


def test_pf_fall_ignores_gases_older_than_24_h():
    history = PatientHistory(
        derivations=[gas(T0 - timedelta(hours=24, minutes=1), pf_ratio=500.0),
                     gas(T0 - timedelta(hours=23), pf_ratio=320.0)]
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
            gas(T0 - timedelta(hours=3), pf_ratio=500.0,
                flags=frozenset({QualityFlag.PAO2_ABOVE_ALVEOLAR})),
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
    history = PatientHistory(derivations=[gas(T0 - timedelta(hours=1), pf_ratio=400.0,
                                              preliminary=True)])
    assert only(FALL, gas(pf_ratio=200.0), history).preliminary is True


# --- rule 3: A-a on room air -----------------------------------------------------------

ROOM = AaRoomAirRule()


def room_air(aa: float, expected: float = 17.5, **kw: object) -> Derivation:
    # expected 17.5 = (60 + 10) / 4 at age 60, StatPearls (reference sheet section 4).
    values: dict[str, object] = dict(fio2=0.21, fio2_source=FiO2Source.ROOM_AIR,
                                     aa_gradient=aa, aa_gradient_expected=expected,
                                     age_years=60.0)
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


def rise_history(aa: float = 100.0, fio2: float = 0.5, hours: float = 4) -> PatientHistory:
    return PatientHistory(derivations=[gas(T0 - timedelta(hours=hours), aa_gradient=aa,
                                           fio2=fio2)])


@pytest.mark.parametrize(("aa", "fired"), [(120.0, True), (119.9, False), (120.1, True)])
def test_aa_rise_fires_at_20_mmhg_over_the_previous_gas(aa, fired):
    outcome = only(RISE, gas(aa_gradient=aa), rise_history())
    assert outcome.fired is fired


@pytest.mark.parametrize(("previous_fio2", "judged"), [(0.45, True), (0.55, True),
                                                       (0.44, False), (0.56, False)])
def test_aa_rise_needs_comparable_fio2_within_005(previous_fio2, judged):
    outcome = only(RISE, gas(aa_gradient=130.0), rise_history(fio2=previous_fio2))
    assert outcome.fired is judged
    if not judged:
        assert "comparable FiO2" in outcome.reason


@pytest.mark.parametrize(("hours", "judged"), [(11.9, True), (12.0, True), (12.1, False)])
def test_aa_rise_looks_back_12_h(hours, judged):
    outcome = only(RISE, gas(aa_gradient=130.0), rise_history(hours=hours))
    assert outcome.fired is judged


def test_aa_rise_compares_with_the_latest_previous_gas():
    history = PatientHistory(derivations=[
        gas(T0 - timedelta(hours=6), aa_gradient=80.0),
        gas(T0 - timedelta(hours=2), aa_gradient=115.0),
    ])
    outcome = only(RISE, gas(aa_gradient=130.0), history)
    assert outcome.numbers["previous_aa"] == 115.0
    assert not outcome.fired


def test_aa_rise_skips_a_gas_at_another_fio2_for_the_latest_comparable_one():
    history = PatientHistory(derivations=[
        gas(T0 - timedelta(hours=6), aa_gradient=90.0, fio2=0.5),
        gas(T0 - timedelta(hours=2), aa_gradient=200.0, fio2=0.8),
    ])
    outcome = only(RISE, gas(aa_gradient=115.0, fio2=0.5), history)
    assert outcome.numbers["previous_aa"] == 90.0
    assert outcome.fired  # +25 mmHg at the same FiO2


def test_trend_rules_do_not_compare_gases_on_an_estimated_fio2():
    # Device-and-flow FiO2 scatters by 0.04-0.15 (reference sheet section 8, Wettstein 2005).
    estimated = frozenset({QualityFlag.ESTIMATED_FIO2})
    history = PatientHistory(derivations=[
        gas(T0 - timedelta(hours=3), pf_ratio=450.0, aa_gradient=40.0, flags=estimated),
    ])
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
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=8), 0.21),
                                          FiO2Point(T0 - timedelta(hours=1), 0.35)])
    outcome = only(ESC, gas(fio2=0.45), history)
    assert outcome.fired  # 0.21 was still in effect 6 h ago


def test_oxygen_escalation_ignores_changes_before_the_window():
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=9), 0.21),
                                          FiO2Point(T0 - timedelta(hours=7), 0.40)])
    outcome = only(ESC, gas(fio2=0.45), history)
    assert not outcome.fired and outcome.cleared


def test_oxygen_escalation_is_marked_estimated_only_when_the_fio2_was():
    # Judged on an SpO2 reading between gases, but with a charted FiO2: the rise itself
    # is measured, so the flag is not "estimated"; from device and flow it is.
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=5), 0.40)])
    charted = replace(spo2_estimate(T0, 200.0), fio2=0.75)
    assert only(ESC, charted, history).fired
    assert only(ESC, charted, history).estimated is False
    from_device = replace(charted, fio2_source=FiO2Source.DEVICE_ESTIMATE,
                          flags=charted.flags | {QualityFlag.ESTIMATED_FIO2})
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
    history = PatientHistory(derivations=[gas(T0 - timedelta(hours=3), pf_ratio=400.0,
                                              aa_gradient=60.0)])
    for outcome in evaluate(rules, gas(pf_ratio=pf, aa_gradient=aa), history, NOW):
        assert not (outcome.fired and outcome.cleared)
        assert (outcome.priority is not None) is outcome.fired


@given(pf_values, st.sampled_from([QualityFlag.PAO2_ABOVE_ALVEOLAR, QualityFlag.NOT_ARTERIAL]))
def test_nothing_fires_on_unreliable_data_whatever_the_numbers(pf, flag):
    d = gas(pf_ratio=pf, aa_gradient=400.0, fio2=1.0, flags=frozenset({flag}))
    history = PatientHistory(fio2_points=[FiO2Point(T0 - timedelta(hours=1), 0.21)])
    assert not any(o.fired for o in evaluate(default_rules(), d, history, NOW))
