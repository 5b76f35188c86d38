"""gasgap splits an HL7 v2 message itself (``adapters.hl7v2.parse``: segments by CR,
fields by MSH-1, then repetitions, components and subcomponents by MSH-2 when a field
is read). Checked against python-hl7 (PyPI ``hl7``), a reference implementation of the
same split, on the project's sample messages and on random damage to them: every field
of every segment reads the same, after HL7 unescaping, as python-hl7's tree normalised
to repetitions of components of subcomponents."""

from __future__ import annotations

from typing import Any

import hl7
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from adapters.hl7v2.ack import Hl7Error
from adapters.hl7v2.parse import _Segments, _split_message
from tests import hl7_samples as h

SAMPLES = [v for v in vars(h).values() if isinstance(v, str) and v.startswith("MSH")] + [
    h.abg(),
    h.abg(pao2="\\S\\68"),
    h.abg(version="2.3", status="C"),
]
#: What damage inserts: separators, escapes, line breaks, ordinary text.
PIECES = ["|", "^", "~", "\\", "&", "\r", "\n", "X", " ", "\\F\\", "\\S\\", "\\X41\\", "\\E\\"]


def _reference(text: str) -> list[list[list[list[list[str]]]]]:
    """python-hl7's split, each field made repetitions of components of subcomponents
        (python-hl7 nests only as deep as the separators a field holds), unescaped with
        gasgap's own unescaping (escapes are not the split's business). Segments without a
    name (empty lines) are left out on both sides: the reader passes them over."""
    message = hl7.parse(text)
    seps = message.separators
    unescape = _Segments(_split_message(text)).unescape  # the same rules either side
    assert seps[1:5] == text[3] + text[5] + text[4] + text[7]

    def field(node: Any) -> list[list[list[str]]]:
        if isinstance(node, str):
            return [[[unescape(node)]]]
        out: list[list[list[str]]] = []
        for rep in node:
            if isinstance(rep, str):
                out.append([[unescape(rep)]])
                continue
            out.append(
                [
                    [unescape(comp)] if isinstance(comp, str) else [unescape(str(s)) for s in comp]
                    for comp in rep
                ]
            )
        return out

    return [[field(seg[n]) for n in range(len(seg))] for seg in message if str(seg[0]).strip()]


def _ours(text: str) -> list[list[list[list[list[str]]]]]:
    message = _split_message(text)
    reader = _Segments(message)
    return [
        [reader.reps(seg, n) for n in range(len(seg))] for seg in message.segments if seg[0].strip()
    ]


def _normal(text: str) -> str:
    return text.replace("\r\n", "\r").replace("\n", "\r").strip()


def test_every_sample_splits_as_python_hl7_splits_it() -> None:
    assert len(SAMPLES) >= 10
    for text in SAMPLES:
        assert _ours(_normal(text)) == _reference(_normal(text))


@settings(max_examples=400, deadline=None)
@given(
    st.sampled_from(SAMPLES),
    st.lists(st.tuples(st.floats(0, 1), st.sampled_from(PIECES)), min_size=1, max_size=6),
)
def test_damaged_messages_split_as_python_hl7_splits_them(
    text: str, damage: list[tuple[float, str]]
) -> None:
    # damage after the header segment: python-hl7 reads a header cut short after
    # MSH-2 as MSH-2 without its last character and then another MSH (a case gasgap
    # refuses anyway: no message type)
    start = _normal(text).index("\r") + 1
    for where, piece in damage:
        at = start + int(where * (len(text) - start))
        text = text[:at] + piece + text[at:]
    text = _normal(text)
    try:
        ours = _ours(text)
    except Hl7Error:
        assume(False)  # refused before any split (first segment not MSH, bad MSH-2)
    assert ours == _reference(text)
