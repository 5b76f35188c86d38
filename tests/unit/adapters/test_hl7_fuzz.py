"""Mutated messages: whatever arrives, parse_oru returns a ParsedMessage or raises
Hl7Error, never any other exception (a property that must hold for every input).
Also checked for every result: each Reading is a valid canonical Reading (it exists,
so it passed its own range checks) and every rejection names an OBX field.
"""

from datetime import UTC, datetime, timedelta, timezone

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adapters.codes import CodeTable
from adapters.hl7v2 import Hl7Error, ParsedMessage, build_ack, parse_oru
from adapters.hl7v2.ack import recover_header
from tests import hl7_samples as s

CODES = CodeTable.load()
SEEDS = [s.ABG_251, s.ABG_KPA_23, s.VENOUS_SPM, s.PULSE_OX, s.VENT, s.MIXED]
HL7_CHARS = "|^~\\&\r\n" + "0123456789.-+ %[]AZFCPWXUDIOBNSV" + "\x0b\x1c\xff"


def parse_or_error(raw: bytes | str) -> ParsedMessage | Hl7Error:
    try:
        return parse_oru(
            raw,
            received_at=datetime(2026, 3, 15, tzinfo=UTC),
            codes=CODES,
            source_system="fuzz",
            site_tz=timezone(timedelta(hours=-7)),
            patient_id_system=s.MRN_SYSTEM,
        )
    except Hl7Error as exc:
        assert exc.ack_code in ("AE", "AR") and exc.reason
        return exc


@st.composite
def mutated(draw: st.DrawFn) -> str:
    text = draw(st.sampled_from(SEEDS))
    for _ in range(draw(st.integers(1, 6))):
        pos = draw(st.integers(0, len(text)))
        action = draw(st.sampled_from(["insert", "delete", "replace", "drop_field"]))
        if action == "insert":
            text = text[:pos] + draw(st.text(HL7_CHARS, min_size=1, max_size=4)) + text[pos:]
        elif action == "delete":
            text = text[:pos] + text[pos + draw(st.integers(1, 8)) :]
        elif action == "replace":
            text = text[:pos] + draw(st.sampled_from(HL7_CHARS)) + text[pos + 1 :]
        else:
            fields = text.split("|")
            if len(fields) > 2:
                del fields[draw(st.integers(1, len(fields) - 1))]
                text = "|".join(fields)
    return text


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutated())
def test_a_mutated_message_is_read_or_refused_never_crashes(raw: str) -> None:
    result = parse_or_error(raw)
    if isinstance(result, ParsedMessage):
        for rejection in result.rejected:
            assert rejection.where.startswith("OBX[")
        for reading in result.readings:
            assert reading.effective_at.utcoffset() == timedelta(0)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=300) | mutated().map(lambda t: t.encode("latin-1", "replace")))
def test_arbitrary_bytes_are_read_or_refused(raw: bytes) -> None:
    parse_or_error(raw)


@settings(max_examples=200, deadline=None)
@given(mutated() | st.binary(max_size=200))
def test_an_ack_can_always_be_built_and_names_ae(raw: str | bytes) -> None:
    ack = build_ack(raw, "AE", "fuzz", control_id="F1")
    assert ack.startswith(b"MSH") and b"\rMSA|AE|" in ack.replace(
        recover_header(raw).field_sep.encode("utf-8", "replace"), b"|"
    )
