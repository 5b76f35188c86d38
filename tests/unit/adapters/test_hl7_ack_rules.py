"""What an ACK may say and when a message must be kept whole.

ACK structure is checked with hl7apy (strict validation of the ACK message structure
of HL7 v2.5.1). The rule that no ACK carries a link or a database driver's statement
is the project's (issue: hardening), checked with hypothesis over arbitrary reasons.
"""

from __future__ import annotations

from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message
from hypothesis import given
from hypothesis import strategies as st

from adapters.hl7v2.ack import ack_for_batch, build_ack, safe_text, unreadable_reason
from tests import hl7_samples as s

DRIVER = (
    "(sqlite3.OperationalError) database is locked\n[SQL: INSERT INTO quarantine "
    "(source) VALUES (?)]\n[parameters: ('hl7:lab',)]\n(Background on this error at: "
    "https://sqlalche.me/e/21/e3q8)"
)


def test_a_driver_dump_and_its_link_never_reach_the_ack() -> None:
    ack = build_ack(
        s.ABG_251.encode(),
        "AR",
        f"failed: {DRIVER}",
        control_id="A1",
        timestamp="20260315090000",
        error_code="207",
    ).decode()
    assert "INSERT" not in ack and "sqlalche.me" not in ack and "parameters" not in ack
    parsed = parse_message(ack, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    parsed.validate()
    assert parsed.msa.msa_1.to_er7() == "AR"


@given(
    st.text(max_size=300),
    st.sampled_from(["http://", "https://", "HTTPS://", "www."]),
    st.text(alphabet="abcdefghij./-_?=", min_size=1, max_size=40),
)
def test_no_link_survives_in_any_reason(before: str, scheme: str, rest: str) -> None:
    cleaned = safe_text(f"{before} {scheme}{rest} end")
    assert scheme.lower() not in cleaned.lower()


def test_a_message_with_no_readable_obx_is_kept_whole() -> None:
    assert unreadable_reason({"(no code)": 2}, readings=0, rejected=0) is not None
    assert unreadable_reason({"^LN": 1}, readings=0, rejected=0) is not None
    # other tests only (a potassium, LOINC 2823-3) are not ours to read: AA, ignored
    assert unreadable_reason({"2823-3^LN": 1}, readings=0, rejected=0) is None
    assert unreadable_reason({"(no code)": 1}, readings=2, rejected=0) is None
    assert unreadable_reason({"(no code)": 1}, readings=0, rejected=1) is None


def test_ae_only_when_everything_was_refused() -> None:
    assert ack_for_batch(stored=0, duplicates=0, quarantined=3)[0] == "AE"
    assert ack_for_batch(stored=1, duplicates=0, quarantined=3)[0] == "AA"
    assert ack_for_batch(stored=0, duplicates=2, quarantined=0)[0] == "AA"
    assert ack_for_batch(stored=0, duplicates=0, quarantined=0)[0] == "AA"
