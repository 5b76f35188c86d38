"""MLLP framing (HL7 v2 implementation guide, appendix C: <VT> message <FS><CR>) and
messages from files. The frame bytes are written here as literals from the standard
(0x0B, 0x1C, 0x0D), not taken from the module under test.
"""

from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from adapters.hl7v2.files import iter_hl7_file
from adapters.hl7v2.framing import MessageTooLarge, MllpFramer, frame
from tests import hl7_samples as s

VT, FS, CR = b"\x0b", b"\x1c", b"\x0d"
M1 = s.ABG_251.encode()
M2 = s.VENT.encode()
M3 = s.PULSE_OX.encode()


def wrapped(message: bytes) -> bytes:
    return VT + message + FS + CR


def feed_all(framer: MllpFramer, pieces: list[bytes]) -> list[bytes]:
    out: list[bytes] = []
    for piece in pieces:
        out += framer.feed(piece)
    return out


def test_frame_wraps_a_message_in_the_standard_bytes() -> None:
    assert frame(b"MSH|x") == b"\x0bMSH|x\x1c\x0d"


def test_one_frame_in_one_piece() -> None:
    assert MllpFramer().feed(wrapped(M1)) == [M1]


def test_split_at_every_byte_boundary() -> None:
    stream = wrapped(M1) + wrapped(M2)
    for cut in range(len(stream) + 1):
        framer = MllpFramer()
        assert feed_all(framer, [stream[:cut], stream[cut:]]) == [M1, M2], cut


def test_one_byte_at_a_time() -> None:
    stream = wrapped(M1) + wrapped(M2)
    framer = MllpFramer()
    assert feed_all(framer, [stream[i : i + 1] for i in range(len(stream))]) == [M1, M2]
    assert not framer.in_message


@given(
    st.lists(st.integers(min_value=0, max_value=3 * len(M1)), max_size=12),
    st.permutations([M1, M2, M3]),
)
def test_any_split_of_any_order_of_frames_gives_the_same_messages(
    cuts: list[int], messages: list[bytes]
) -> None:
    stream = b"".join(wrapped(m) for m in messages)
    points = sorted({min(c, len(stream)) for c in cuts})
    pieces = [stream[a:b] for a, b in zip([0, *points], [*points, len(stream)], strict=True)]
    assert feed_all(MllpFramer(), pieces) == messages


def test_noise_between_frames_and_a_missing_cr_are_tolerated() -> None:
    stream = b"\r\n  " + VT + M1 + FS + b"\n" + VT + M2 + FS
    framer = MllpFramer()
    assert framer.feed(stream) == [M1, M2]
    assert framer.discarded_bytes == 5


def test_a_restarted_message_drops_the_unfinished_part() -> None:
    framer = MllpFramer()
    assert framer.feed(VT + b"MSH|half a mess" + VT + M1 + FS + CR) == [M1]


def test_an_oversized_message_raises_then_the_stream_recovers() -> None:
    framer = MllpFramer(max_message_bytes=len(M1))
    big = b"MSH|^~\\&|HGH-LAB|||||ORU^R01|BIG1|P|2.5.1\r" + b"OBX|" * 200
    with pytest.raises(MessageTooLarge) as caught:
        framer.feed(wrapped(M2) + wrapped(big) + wrapped(M1))
    assert caught.value.messages == [M2] and caught.value.ack_code == "AE"
    assert str(len(M1)) in caught.value.reason and caught.value.head.startswith(b"MSH|")
    assert framer.feed(b"") == [M1]


def test_an_oversized_message_over_many_reads_is_discarded_until_the_next_frame() -> None:
    framer = MllpFramer(max_message_bytes=1000)
    framer.feed(VT + b"MSH|" + b"x" * 500)
    with pytest.raises(MessageTooLarge):
        framer.feed(b"x" * 600)
    for _ in range(50):  # the rest of it keeps coming, and is dropped without error
        assert framer.feed(b"y" * 10_000) == []
    assert framer.feed(FS + CR + wrapped(M1)) == [M1]


def test_the_limit_must_be_positive() -> None:
    with pytest.raises(ValueError, match="max_message_bytes"):
        MllpFramer(0)


# --- files ------------------------------------------------------------------------------


def test_a_file_with_blank_lines_between_lf_messages(tmp_path: Path) -> None:
    path = tmp_path / "feed.hl7"
    path.write_bytes(b"\n\n".join(m.replace(b"\r", b"\n") for m in (M1, M2, M3)))
    assert list(iter_hl7_file(path)) == [M1, M2, M3]


def test_a_file_of_consecutive_messages_with_crlf(tmp_path: Path) -> None:
    path = tmp_path / "feed.hl7"
    path.write_bytes(b"".join(m.replace(b"\r", b"\r\n") for m in (M1, M2)))
    assert list(iter_hl7_file(path)) == [M1, M2]


def test_a_file_of_mllp_frames_in_a_batch_envelope(tmp_path: Path) -> None:
    path = tmp_path / "feed.hl7"
    path.write_bytes(
        b"FHS|^~\\&|HGH-LAB\rBHS|^~\\&|HGH-LAB\r" + wrapped(M1) + wrapped(M2) + b"BTS|2\rFTS|1\r"
    )
    assert list(iter_hl7_file(path)) == [M1, M2]


def test_stray_lines_are_not_glued_onto_a_neighbouring_message(tmp_path: Path) -> None:
    path = tmp_path / "feed.hl7"
    path.write_bytes(M1 + b"\rOBX|9|NM|2703-7^^LN||99|mm[Hg]|||||F\r" + M2)
    messages = list(iter_hl7_file(path))
    assert messages[0] == M1 and messages[-1] == M2 and len(messages) == 3


def test_a_crlf_split_across_read_chunks_is_one_line_end(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import adapters.hl7v2.files as files

    monkeypatch.setattr(files, "_CHUNK", 7)  # tiny reads put CR and LF in different chunks
    path = tmp_path / "feed.hl7"
    path.write_bytes(b"".join(m.replace(b"\r", b"\r\n") for m in (M1, M2, M3)))
    assert list(iter_hl7_file(path)) == [M1, M2, M3]


def test_an_oversized_message_in_a_file_is_skipped(tmp_path: Path) -> None:
    path = tmp_path / "feed.hl7"
    path.write_bytes(M1 + b"MSH|^~\\&|X\r" + b"OBX|1\r" * 5000 + M2)
    assert list(iter_hl7_file(path, max_message_bytes=len(M1) + 10)) == [M1, M2]


@given(st.lists(st.integers(min_value=0, max_value=6000), max_size=10))
def test_an_oversized_frame_between_good_ones_loses_neither_neighbour(cuts: list[int]) -> None:
    big = b"MSH|^~\\&|BIG\r" + b"NTE|" * 1000
    stream = wrapped(M1) + wrapped(big) + wrapped(M2)
    points = sorted({min(c, len(stream)) for c in cuts})
    pieces = [stream[a:b] for a, b in zip([0, *points], [*points, len(stream)], strict=True)]
    framer = MllpFramer(max_message_bytes=len(M1) + len(M2))
    got: list[bytes] = []
    refused = 0
    for piece in pieces:
        try:
            got += framer.feed(piece)
        except MessageTooLarge as exc:
            refused += 1
            got += exc.messages
            got += framer.feed(b"")
    assert got == [M1, M2] and refused == 1
