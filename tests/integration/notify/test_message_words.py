"""What every channel's message says, built from the engine's own notification
(``wording.notification_for``) as the pipeline builds it: the advisory sentence once,
numbers in words with their units, times with their date and zone, no raw keys, and a
retraction that says what it withdraws and why.

Expected words are our own reading of what a charge nurse needs (common practice, no
source); the numbers are the invented ones put in.
"""

from __future__ import annotations

import json
import re
from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest
from hypothesis import given
from hypothesis import strategies as st

from adapters.notify import render
from monitor.engine.model import ADVISORY, Alert, AlertState, Location, Priority
from monitor.engine.wording import notification_for
from storage.serialize import json_to_notification, notification_to_json

NOW = datetime(2026, 3, 5, 16, 40, tzinfo=UTC)
DRAWN = NOW - timedelta(minutes=25)
RAW_KEYS = ("pf_at", "previous_aa", "best_pf", "change_percent", "aa_excess", "fio2_rise")


def _alert(rule: str = "oxygenation-band", state: AlertState = AlertState.RAISED) -> Alert:
    return Alert(
        alert_id="a-1",
        patient_key="urn:x|HM720001",
        rule=rule,
        priority=Priority.HIGH,
        state=state,
        raised_at=NOW,
        updated_at=NOW,
        sample_id="s-1",
        summary="P/F <= 100: P/F 79",
        location=Location("ICU-North", "7", "1"),
    )


def _numbers() -> dict[str, object]:
    # Shaped as the band rule writes them (monitor/engine/rules.py), values invented.
    return {
        "pf": 79.0,
        "pf_at": DRAWN.isoformat(),
        "adjusted": True,
        "pf_measured": 65.0,
        "threshold": 100.0,
    }


def _message(event: str = "raised", numbers: dict[str, object] | None = None) -> str:
    alert = _alert(state=AlertState.RETRACTED if event == "retracted" else AlertState.RAISED)
    n = notification_for(
        alert,
        event,
        None,
        display_key="HM720001",
        now=NOW,
        numbers=_numbers() if numbers is None else numbers,
        tz=ZoneInfo("America/Denver"),
    )
    return render.plain_text_body(n)


def test_the_advisory_sentence_is_said_once() -> None:
    body = _message()
    assert body.count(ADVISORY) == 1, body
    card = render.cds_hooks_cards(
        notification_for(
            _alert(), "raised", None, display_key="HM720001", now=NOW, numbers=_numbers()
        )
    )
    detail = card["cards"][0]["detail"]
    assert detail.count("Advisory only") == 1, detail


def test_numbers_in_words_with_units_and_labelled_times_no_raw_keys() -> None:
    body = _message()
    key_numbers = body.split("Key numbers:")[1]
    for raw in RAW_KEYS:
        assert raw not in key_numbers, (raw, key_numbers)
    assert "P/F 79 mmHg, adjusted for altitude" in key_numbers
    assert "P/F as measured (before the altitude adjustment) 65 mmHg" in key_numbers
    # 16:15 UTC drawn, a Denver site (UTC-7 in March, from memory): written in site
    # time with its date and its labelled offset, never in UTC beside site time.
    assert "(at 5 Mar 09:15 UTC\u221207:00)" in key_numbers
    assert "Time: 5 Mar 09:40 UTC\u221207:00." in body  # created_at, 16:40 UTC
    assert "16:15" not in body and "16:40" not in body
    assert "P/F limit crossed 100 mmHg" in key_numbers
    assert "Rule: P/F in a low band." in body


def test_a_retraction_says_which_numbers_and_why() -> None:
    body = _message("retracted", numbers={})
    assert "no numbers recorded" not in body
    assert "P/F <= 100: P/F 79" in body  # the numbers it withdraws
    assert "withdrawn or marked as entered in error" in body  # and why
    assert body.count(ADVISORY) == 1


def test_offset_label_reads_the_right_way_round() -> None:
    # Etc/GMT-2 is two hours ahead of UTC (IANA tz database, etcetera file: the sign
    # of Etc/GMT names is inverted); the label must say UTC+02:00.
    ahead = datetime(2026, 3, 5, 12, 0, tzinfo=ZoneInfo("Etc/GMT-2"))
    assert render.offset_label(ahead) == "UTC+02:00"
    assert (
        render.offset_label(datetime(2026, 7, 1, tzinfo=ZoneInfo("America/Denver")))
        == "UTC\u221206:00"
    )  # MDT, from memory; a true minus sign, as on the unit board
    assert render.offset_label(NOW) == "UTC"


@given(
    st.dictionaries(
        st.sampled_from(
            [
                "pf",
                "best_pf",
                "aa_gradient",
                "previous_aa",
                "aa_rise",
                "fio2",
                "fio2_lowest",
                "sf",
                "change_percent",
                "aa_expected",
                "aa_excess",
            ]
        ),
        st.floats(min_value=0, max_value=900, allow_nan=False),
        min_size=1,
    )
)
def test_known_number_keys_never_show_raw(numbers: dict[str, float]) -> None:
    text = "\n".join(render.number_lines(numbers))
    assert not re.search(r"\b[a-z]+_[a-z_]+\b", text), text
    assert len(text.splitlines()) == len(numbers)


def test_log_fields_are_plain_json_values() -> None:
    n = notification_for(
        _alert(), "raised", None, display_key="HM720001", now=NOW, numbers=_numbers()
    )
    from adapters.notify.log import log_fields

    fields = log_fields(n)
    assert fields["flag_number_pf"] == 79.0
    assert all(isinstance(v, int | float | bool | str | type(None)) for v in fields.values())
    json.dumps(fields)


@pytest.mark.parametrize("event", ["raised", "acknowledged", "resolved"])
def test_every_event_ends_with_the_advisory(event: str) -> None:
    assert _message(event).rstrip().endswith(ADVISORY)


def test_the_site_zone_survives_the_outbox_and_rules_the_message() -> None:
    # Through the outbox the notification is stored as JSON with times in UTC; the site
    # zone travels beside them, so the sent message still reads in site time.
    n = notification_for(
        _alert(),
        "raised",
        None,
        display_key="HM720001",
        now=NOW,
        numbers=_numbers(),
        tz=ZoneInfo("Etc/GMT-2"),
    )
    again = json_to_notification(notification_to_json(n))
    assert again.created_at == NOW and again.site_zone == "Etc/GMT-2"
    body = render.plain_text_body(again)
    assert "Time: 5 Mar 18:40 UTC+02:00." in body  # Etc/GMT-2 is UTC+2 (IANA)
    assert "GMT" not in body


def test_the_webhook_payload_says_the_advisory_once() -> None:
    n = notification_for(
        _alert(), "raised", None, display_key="HM720001", now=NOW, numbers=_numbers()
    )
    payload = json.dumps(render.flag_payload(n), ensure_ascii=False)
    assert payload.count("Advisory only") == 1


def test_the_card_summary_names_priority_and_patient_once() -> None:
    n = notification_for(
        _alert(), "raised", None, display_key="HM720001", now=NOW, numbers=_numbers()
    )
    summary = render.card_summary(n)
    assert summary.count("HM720001") == 1 and len(summary) < 140
    assert "HIGH" in summary


def test_a_closed_flag_is_not_announced_by_its_priority() -> None:
    body = _message("retracted", numbers={})
    assert body.startswith("Flag withdrawn (it was high priority).")
    assert "High priority flag" not in body


def test_a_fall_in_key_numbers_has_a_true_minus() -> None:
    lines = render.number_lines({"best_pf": 290.0, "pf": 182.0, "change_percent": -37.2})
    assert "change in P/F \u221237 %" in lines
