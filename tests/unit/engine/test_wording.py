"""Notification wording: display key, what changed, inputs, quality flags, advisory.

All data invented (Hollowmere General Hospital, MRN system urn:oid:2.999.1.1.1).
Expected texts are our reading of what a charge nurse needs to see (common practice, no
source): trends before and after with units, site time with its date and a labelled
offset, the advisory sentence once. Offsets of named zones are from the IANA tz
database (from memory: America/Denver is UTC-7 in winter, Europe/Helsinki UTC+2).
"""

from dataclasses import replace
from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest
from hypothesis import given
from hypothesis import strategies as st

from monitor.engine.alerts import AlertSettings, apply_outcome, escalate_due
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    ADVISORY,
    Derivation,
    FiO2Source,
    InputUsed,
    Location,
    Priority,
    QualityFlag,
    Specimen,
)
from monitor.engine.rules import RuleOutcome
from monitor.engine.wording import (
    SUMMARY_MAX,
    age_text,
    html_body,
    inputs_text,
    notification_for,
    outcome_summary,
    patient_display,
    plain_text_body,
    site_time,
    what_changed,
)

T0 = datetime(2026, 3, 4, 6, 10, tzinfo=UTC)
PATIENT = "urn:oid:2.999.1.1.1|HGH-000042"
BED = Location(unit="ICU-North", room="N3", bed="B2")

NUMBERS = {
    "pf": 182.0,
    "pf_at": (T0 + timedelta(hours=4)).isoformat(),
    "best_pf": 290.0,
    "best_pf_at": T0.isoformat(),
    "change_percent": -37.2,
}


def sample() -> Derivation:
    drawn = T0 + timedelta(hours=4)
    return Derivation(
        patient_key=PATIENT,
        sample_id="lab-778-pao2",
        drawn_at=drawn,
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=91.0,
        fio2=0.5,
        fio2_source=FiO2Source.CHARTED,
        paco2=41.0,
        barometric_pressure=626.5,
        peep=8.0,
        pf_ratio=182.0,
        location=BED,
        inputs=(
            InputUsed(
                "fio2", 0.5, "charted before the draw", "fio2-1", drawn - timedelta(minutes=12)
            ),
        ),
        flags=frozenset({QualityFlag.ESTIMATED_PRESSURE}),
    )


def fall_outcome(**kw: object) -> RuleOutcome:
    values: dict[str, object] = dict(
        rule_id="pf-fall",
        patient_key=PATIENT,
        sample_id="lab-778-pao2",
        fired=True,
        priority=Priority.MEDIUM,
        cleared=False,
        label="P/F fall >= 25 %",
        numbers=NUMBERS,
    )
    values.update(kw)
    return RuleOutcome(**values)  # type: ignore[arg-type]


def raised_alert(**kw: object):
    decision = apply_outcome(
        None,
        None,
        fall_outcome(**kw),
        sample(),
        T0 + timedelta(hours=4, minutes=2),
        AlertSettings(),
    )
    assert decision.alert is not None
    return decision.alert


NOW = T0 + timedelta(hours=4, minutes=2)


SAMPLE = sample()


def note(event: str = "raised", alert=None, derivation=SAMPLE, tz=UTC):
    return notification_for(
        alert or raised_alert(),
        event,
        derivation,
        display_key="…0042",
        now=NOW,
        numbers=NUMBERS,
        tz=tz,
    )


MINUS = "\u2212"


def test_what_changed_says_the_fall_before_and_after_with_units_and_times():
    # 290 -> 182 is a fall of 37.2 %, written with a true minus sign; both times carry
    # their date and zone even on the day of the message.
    assert what_changed(NUMBERS, NOW) == (
        f"P/F 290 \u2192 182 mmHg ({MINUS}37 %); 290 was the best of the window, at "
        "4 Mar 06:10 UTC; 182 at 4 Mar 10:10 UTC"
    )


def test_times_are_written_in_the_site_zone():
    # A site at UTC-7 (America/Denver on 4 March, before the US change to daylight
    # time): 06:10 UTC is 23:10 the evening before.
    text = what_changed(NUMBERS, NOW, ZoneInfo("America/Denver"))
    assert f"at 3 Mar 23:10 UTC{MINUS}07:00" in text
    assert f"182 at 4 Mar 03:10 UTC{MINUS}07:00" in text


def test_an_etc_gmt_zone_is_labelled_by_its_offset_not_its_name():
    # IANA "Etc/GMT-2" is two hours AHEAD of UTC (the sign of Etc names is inverted).
    tz = ZoneInfo("Etc/GMT-2")
    text = what_changed(NUMBERS, NOW, tz)
    assert "at 4 Mar 08:10 UTC+02:00" in text
    assert "GMT" not in text
    assert site_time(T0, ZoneInfo("Asia/Kolkata"), NOW) == "4 Mar 11:40 UTC+05:30"


def test_a_time_from_another_year_carries_its_year():
    assert site_time(datetime(2025, 12, 31, 23, 0, tzinfo=UTC), UTC, NOW) == (
        "31 Dec 2025 23:00 UTC"
    )
    assert site_time("not a time", UTC, NOW) == "time unknown"
    assert site_time(datetime(2026, 3, 4, 6, 10), UTC, NOW).endswith("(zone not given)")


def test_inputs_are_in_site_time_with_their_date():
    helsinki = ZoneInfo("Europe/Helsinki")  # UTC+2 in March
    lines = inputs_text(sample(), NOW, helsinki)
    # drawn 10:10 UTC, the message written 10:12 UTC: its age is said with it
    assert lines[0] == "PaO2 91 mmHg, drawn 4 Mar 12:10 UTC+02:00, 2 min before this message"
    assert "FiO2 0.50 (charted before the draw, 4 Mar 11:58 UTC+02:00)" in lines


def test_notification_names_patient_location_inputs_flags_and_advisory():
    n = note()
    assert n.patient_display == "…0042"
    assert "ICU-North N3 B2" in n.detail
    assert f"P/F 290 \u2192 182 mmHg ({MINUS}37 %)" in n.detail
    assert "FiO2 0.50 (charted before the draw, 4 Mar 09:58 UTC)" in n.detail
    assert "PaCO2 41 mmHg" in n.detail
    assert "barometric pressure 626.5 mmHg" in n.detail
    assert QualityFlag.ESTIMATED_PRESSURE.value in n.detail
    assert n.advisory == ADVISORY
    assert n.summary.startswith("MEDIUM New flag (…0042, ICU-North N3 B2): P/F fall")
    assert len(n.summary) <= SUMMARY_MAX


def test_the_mrn_never_appears_when_the_display_key_hides_it():
    n = note()
    assert "HGH-000042" not in n.summary and "HGH-000042" not in n.detail


@pytest.mark.parametrize(
    ("minutes", "said"),
    [
        (-5, ""),  # drawn "after" the message: no age is made up
        (0, "less than a minute"),
        (35, "35 min"),
        (60, "1 h"),
        (80, "1 h 20 min"),
        (24 * 60, "1 day"),
        (3 * 24 * 60 + 125, "3 days 2 h"),
    ],
)
def test_the_age_of_a_sample_in_words(minutes: int, said: str) -> None:
    assert age_text(NOW - timedelta(minutes=minutes), NOW) == said


def test_an_estimate_never_reads_as_a_measured_pao2_in_a_message():
    # SpO2 93 % gives an imputed PaO2 (Severinghaus inverse, tested in test_derive.py);
    # the message says it is estimated, never "PaO2 67 mmHg, drawn ...".
    from_spo2 = replace(
        sample(),
        estimated=True,
        pao2=67.0,
        spo2=93.0,
        specimen=Specimen.UNKNOWN,
        flags=frozenset({QualityFlag.ESTIMATED_FROM_SPO2}),
    )
    lines = inputs_text(from_spo2, NOW, UTC)
    assert not any(line.startswith("PaO2 67") for line in lines), lines
    assert "SpO2 93 %, recorded 4 Mar 10:10 UTC, 2 min before this message" in lines
    assert any("estimated" in line and "67" in line and "not measured" in line for line in lines)


def test_preliminary_and_estimated_flags_say_so():
    from_spo2 = replace(
        sample(),
        estimated=True,
        specimen=Specimen.UNKNOWN,
        flags=frozenset({QualityFlag.ESTIMATED_FROM_SPO2}),
    )
    n = note(alert=raised_alert(preliminary=True, estimated=True), derivation=from_spo2)
    assert "preliminary" in n.detail and "pulse oximetry" in n.detail
    assert n.preliminary and n.estimated


def test_an_estimated_fio2_on_a_gas_is_not_called_pulse_oximetry():
    # Issue 12 point 9: oxygen escalation on a device-and-flow FiO2, a gas was drawn.
    gas = replace(
        sample(),
        fio2_source=FiO2Source.DEVICE_ESTIMATE,
        flags=frozenset({QualityFlag.ESTIMATED_FIO2}),
    )
    numbers = {
        "fio2": 0.9,
        "fio2_at": NOW.isoformat(),
        "fio2_lowest": 0.4,
        "fio2_lowest_at": T0.isoformat(),
        "fio2_rise": 0.5,
        "fio2_source": "estimated from device and flow",
        "fio2_basis": "estimated from device and flow",
    }
    outcome = fall_outcome(
        rule_id="oxygen-escalation", label="FiO2 up >= 0.20 in 6 h", numbers=numbers, estimated=True
    )
    alert = apply_outcome(None, None, outcome, gas, NOW, AlertSettings()).alert
    n = notification_for(alert, "raised", gas, display_key="…0042", now=NOW, numbers=numbers)
    assert "pulse oximetry" not in n.detail
    assert "estimated from the oxygen device and flow" in n.detail
    assert alert.summary == (
        "FiO2 up >= 0.20 in 6 h: FiO2 0.40 \u2192 0.90 (+0.50); "
        "FiO2 estimated from device and flow (estimated)"
    )


def test_idempotency_key_is_stable_per_change_and_differs_between_changes():
    alert = raised_alert()
    assert note(alert=alert).idempotency_key == note(alert=alert).idempotency_key
    [escalation] = escalate_due([alert], NOW + timedelta(minutes=30), AlertSettings())
    assert escalation.alert is not None
    assert (
        note("escalated", alert=escalation.alert).idempotency_key
        != note(alert=alert).idempotency_key
    )
    later_version = replace(alert, updated_at=NOW + timedelta(minutes=1))
    assert note(alert=later_version).idempotency_key != note(alert=alert).idempotency_key


def test_unknown_event_is_refused():
    with pytest.raises(InvalidInput, match="event"):
        note("exploded")


def test_a_notification_without_derivation_still_carries_the_advisory():
    n = note("escalated", derivation=None)
    assert "Still not acknowledged" in n.summary and n.advisory == ADVISORY
    assert plain_text_body(n).count(ADVISORY) == 1


@pytest.mark.parametrize("event", ["raised", "escalated", "resolved", "retracted", "lowered"])
def test_the_advisory_is_said_exactly_once_in_every_message(event):
    # Issue 16: the advisory sentence was in the detail and added again by the channel.
    n = note(event)
    assert ADVISORY not in n.detail and n.advisory == ADVISORY
    assert plain_text_body(n).count(ADVISORY) == 1
    assert html_body(n).count("Advisory only") == 1


def test_created_at_stays_an_aware_time_and_the_site_zone_is_named():
    n = note(tz=ZoneInfo("America/Denver"))
    assert n.created_at == NOW and n.created_at.utcoffset() is not None
    assert n.site_zone == "America/Denver"
    assert note().site_zone == "UTC"


# --- a retraction says which flag, which numbers and why ---------------------------------


def test_a_withdrawn_result_retraction_names_the_flag_its_numbers_and_why():
    alert = raised_alert()
    n = notification_for(alert, "retracted", None, display_key="…0042", now=NOW, numbers={})
    assert "no numbers recorded" not in n.detail
    assert "P/F fall >= 25 %" in n.detail  # which flag
    assert f"P/F 290 \u2192 182 mmHg ({MINUS}37 %)" in n.detail  # the numbers it withdraws
    assert "withdrawn or marked as entered in error" in n.detail  # and why
    assert "raised 4 Mar 10:12 UTC" in n.detail  # when it was raised, with its date
    assert n.summary.startswith("Flag withdrawn, was MEDIUM (…0042")


def test_a_corrected_result_retraction_says_what_the_result_now_is():
    corrected = replace(sample(), pao2=135.0, pf_ratio=270.0)
    now_numbers = {
        "pf": 270.0,
        "pf_at": corrected.drawn_at.isoformat(),
        "best_pf": 290.0,
        "best_pf_at": T0.isoformat(),
        "change_percent": -6.9,
    }
    n = notification_for(
        raised_alert(), "retracted", corrected, display_key="…0042", now=NOW, numbers=now_numbers
    )
    assert "corrected and no longer meets the rule" in n.detail
    assert f"P/F 290 \u2192 270 mmHg ({MINUS}7 %)" in n.detail  # the corrected result
    assert f"P/F 290 \u2192 182 mmHg ({MINUS}37 %)" in n.detail  # the flag it withdraws


@pytest.mark.parametrize(
    ("mode", "location", "shown"),
    [
        ("mrn", BED, "HGH-000042"),
        ("mrn-last4", BED, "…0042"),
        ("bed", BED, "ICU-North N3 B2"),
        ("bed", None, "…0042"),
    ],
)
def test_patient_display_modes(mode, location, shown):
    assert patient_display(PATIENT, location, mode) == shown


def test_patient_display_refuses_unknown_mode():
    with pytest.raises(InvalidInput, match="display_key"):
        patient_display(PATIENT, None, "name")


def test_outcome_summary_marks_estimates():
    text = outcome_summary(fall_outcome(estimated=True))
    assert text == f"P/F fall >= 25 %: P/F 290 \u2192 182 mmHg ({MINUS}37 %) (estimated)"


def test_a_fall_on_adjusted_values_says_so_in_the_short_text():
    # Issue 12 point 5: "adjusted for altitude (measured N)" whenever it is.
    numbers = {**NUMBERS, "adjusted": True, "pf_measured": 150.0}
    assert outcome_summary(fall_outcome(numbers=numbers)) == (
        f"P/F fall >= 25 %: P/F 290 \u2192 182 mmHg ({MINUS}37 %), adjusted for altitude "
        "(measured 150)"
    )


def test_plain_text_body_holds_summary_and_advisory():
    body = plain_text_body(note())
    assert body.startswith(note().summary) and ADVISORY in body


@given(st.text(min_size=1, max_size=30))
def test_html_body_escapes_everything(user_text):
    n = replace(note(), summary=f"<b>{user_text}", detail=f"{user_text}\n<script>x</script>")
    body = html_body(n)
    assert "<script>" not in body and "<b>" not in body


def test_other_rules_read_well():
    assert what_changed(
        {"aa_gradient": 62.0, "aa_expected": 17.5, "aa_excess": 44.5, "aa_at": T0.isoformat()}, NOW
    ) == (
        "A–a gradient 62 mmHg on room air at 4 Mar 06:10 UTC, age-expected up to 18 mmHg "
        "(44 mmHg above)"
    )
    assert what_changed(
        {
            "fio2": 0.6,
            "fio2_at": T0.isoformat(),
            "fio2_lowest": 0.3,
            "fio2_lowest_at": (T0 - timedelta(hours=3)).isoformat(),
            "fio2_rise": 0.3,
        },
        NOW,
    ) == ("FiO2 0.30 \u2192 0.60 (+0.30): 0.30 at 4 Mar 03:10 UTC, 0.60 at 4 Mar 06:10 UTC")
    assert what_changed(
        {
            "sf": 180.0,
            "sf_at": T0.isoformat(),
            "earlier_sf": 205.0,
            "earlier_sf_at": (T0 - timedelta(hours=1)).isoformat(),
        },
        NOW,
    ) == ("S/F 205 \u2192 180, estimated from SpO2: 205 at 4 Mar 05:10 UTC, 180 at 4 Mar 06:10 UTC")
    assert what_changed({}, NOW) == ""


# --- issue 12: every short text says what fired, its unit and how the FiO2 was known ------


def band(**numbers: object) -> RuleOutcome:
    return fall_outcome(
        rule_id="oxygenation-band",
        label="P/F <= 200",
        numbers={
            "pf": 175.0,
            "pf_at": T0.isoformat(),
            "adjusted": False,
            "fio2": 0.4,
            "fio2_source": "charted before the draw",
            "fio2_basis": "charted",
            **numbers,
        },
    )


def test_band_short_text_with_a_charted_fio2():
    assert outcome_summary(band()) == "P/F <= 200: P/F 175 mmHg; FiO2 0.40 charted"


def test_band_short_text_says_adjusted_for_altitude_with_the_measured_value():
    # Issue 12 point 5: "adjusted for altitude (measured N)", never "to sea level".
    text = outcome_summary(band(pf=182.0, adjusted=True, pf_measured=150.0))
    assert "P/F 182 mmHg adjusted for altitude (measured 150)" in text
    assert "sea level" not in text
    assert "adjusted" not in outcome_summary(band())


def test_band_short_text_shows_both_fio2_when_it_changed_just_before_the_draw():
    # Issue 12 point 3: 0.40 -> 0.80 five minutes before a PaO2 of 70.
    text = outcome_summary(
        band(
            fio2_set=0.8,
            fio2_set_minutes=5,
            pf_on_fio2_set=87.5,
            fio2_set_at=(T0 - timedelta(minutes=5)).isoformat(),
        )
    )
    assert text == (
        "P/F <= 200: P/F 175 mmHg; FiO2 0.40 charted, 0.80 set 5 min before the draw (P/F 88 on it)"
    )


def test_band_short_text_on_an_estimated_fio2_says_estimated_and_held():
    # Issue 12 point 2: the estimate is in the short text, not only in a detail line.
    text = outcome_summary(
        band(
            pf=78.0,
            fio2=0.9,
            fio2_basis="estimated from device and flow",
            fio2_source="estimated from device and flow",
            priority_held=True,
            pf_at_room_air=334.3,
        )
    )
    assert text.startswith("P/F <= 200: P/F 78 mmHg; FiO2 0.90 estimated from device and flow")
    assert "priority held" in text


def test_hypoxaemia_short_text_says_fio2_unknown():
    outcome = fall_outcome(
        rule_id="hypoxaemia",
        label="PaO2 < 60 mmHg with FiO2 unknown",
        numbers={
            "pao2": 52.0,
            "pao2_at": T0.isoformat(),
            "fio2": None,
            "fio2_source": "unknown",
            "fio2_basis": "unknown",
        },
    )
    assert outcome_summary(outcome) == (
        "PaO2 < 60 mmHg with FiO2 unknown: PaO2 52 mmHg; FiO2 unknown"
    )
    assert what_changed(outcome.numbers, NOW).endswith("FiO2 unknown, so no P/F")


def test_a_rise_short_text_gives_before_and_after_with_units():
    outcome = fall_outcome(
        rule_id="aa-rise",
        label="A-a rise >= 20 mmHg and a/A fall >= 0.08",
        numbers={
            "aa_gradient": 451.0,
            "previous_aa": 408.0,
            "aa_rise": 43.0,
            "aa_ratio": 0.147,
            "previous_aa_ratio": 0.228,
            "fio2": 0.8,
            "fio2_basis": "charted",
        },
    )
    assert outcome_summary(outcome) == (
        "A-a rise >= 20 mmHg and a/A fall >= 0.08: A–a 408 \u2192 451 mmHg (+43); "
        "a/A 0.23 \u2192 0.15; FiO2 0.80 charted"
    )


def test_the_patient_stays_in_a_truncated_card_summary():
    long = fall_outcome(label="P/F fall >= 25 % " + "x" * 200)
    n = notification_for(
        raised_alert(label=long.label),
        "raised",
        sample(),
        display_key="…0042",
        now=NOW,
        numbers=NUMBERS,
    )
    assert len(n.summary) == SUMMARY_MAX and "…0042" in n.summary


def test_a_lowered_flag_can_be_worded():
    n = note("lowered")
    assert "priority lowered" in n.summary and plain_text_body(n).count(ADVISORY) == 1


# --- properties: no raw key where a person reads; what the short text must always say -----

RULE_KEYS = {  # every key the rules write (monitor/engine/rules.py), invented values
    "pf": 150.0,
    "pf_at": T0.isoformat(),
    "adjusted": True,
    "pf_measured": 130.0,
    "pf_on_fio2_set": 90.0,
    "pf_at_highest_fio2": 120.0,
    "pf_at_room_air": 300.0,
    "priority_held": True,
    "threshold": 200.0,
    "best_pf": 290.0,
    "best_pf_at": T0.isoformat(),
    "change_percent": -48.0,
    "aa_gradient": 60.0,
    "aa_expected": 18.0,
    "aa_excess": 42.0,
    "aa_at": T0.isoformat(),
    "adult_formula_age": 5,
    "previous_aa": 30.0,
    "previous_aa_at": T0.isoformat(),
    "aa_rise": 30.0,
    "aa_ratio": 0.3,
    "previous_aa_ratio": 0.5,
    "aa_ratio_fall": 0.2,
    "previous_fio2": 0.4,
    "fio2": 0.4,
    "fio2_at": T0.isoformat(),
    "fio2_lowest": 0.21,
    "fio2_lowest_at": T0.isoformat(),
    "fio2_rise": 0.19,
    "fio2_source": "charted before the draw",
    "fio2_basis": "charted",
    "fio2_set": 0.8,
    "fio2_set_at": T0.isoformat(),
    "fio2_set_minutes": 5,
    "sf": 180.0,
    "sf_at": T0.isoformat(),
    "earlier_sf": 190.0,
    "earlier_sf_at": T0.isoformat(),
    "pao2": 52.0,
    "pao2_at": T0.isoformat(),
    "sao2": 86.0,
}
RAW_KEY = r"\b[a-z0-9]+_[a-z0-9_]+\b"


@given(st.sets(st.sampled_from(sorted(RULE_KEYS)), min_size=1))
def test_no_raw_key_anywhere_a_person_reads(keys):
    import re

    numbers = {k: RULE_KEYS[k] for k in keys}
    outcome = fall_outcome(numbers=numbers)
    n = notification_for(
        raised_alert(), "raised", sample(), display_key="…0042", now=NOW, numbers=numbers
    )
    for text in (what_changed(numbers, NOW), outcome_summary(outcome), n.detail, n.summary):
        assert not re.search(RAW_KEY, text), text
        assert "no numbers recorded" not in text


@given(
    adjusted=st.booleans(),
    just_changed=st.booleans(),
    basis=st.sampled_from(
        [
            "charted",
            "measured with the gas",
            "estimated from device and flow",
            "charted after the draw",
        ]
    ),
)
def test_the_short_text_always_says_estimated_fio2_a_late_change_and_altitude(
    adjusted, just_changed, basis
):
    # Issue 12 points 2, 3, 5: said in the short text, not only in a detail line.
    numbers: dict[str, object] = {"fio2_basis": basis}
    if adjusted:
        numbers.update(adjusted=True, pf=182.0, pf_measured=150.0)
    if just_changed:
        numbers.update(
            fio2_set=0.8, fio2_set_minutes=5, pf_on_fio2_set=88.0, fio2_set_at=T0.isoformat()
        )
    text = outcome_summary(band(**numbers))
    assert f"FiO2 0.40 {basis}" in text
    assert ("adjusted for altitude (measured 150)" in text) is adjusted
    assert ("0.80 set 5 min before the draw" in text) is just_changed


def test_every_event_of_the_engine_has_its_words_and_no_other_event_does():
    # Issue 14 point 3: one vocabulary, the engine's event names (alerts.Trigger), each
    # said in both forms; a word for an event the engine never records would be dead.
    from monitor.engine.alerts import Trigger
    from monitor.engine.wording import EVENT_PHRASES, EVENT_WORDS

    events = {t.value for t in Trigger}
    assert set(EVENT_WORDS) == events
    assert set(EVENT_PHRASES) == events
