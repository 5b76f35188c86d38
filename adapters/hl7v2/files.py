"""HL7 v2 messages from a file, streamed (a 1 GB archive is never read whole).

Accepted layouts, alone or mixed: segments ended by CR, LF or CRLF; messages
separated by blank lines, by MLLP framing, or simply by the next MSH; batch envelopes
(FHS, BHS, BTS, FTS) are dropped. Lines that turn up outside a message (after a blank
line, before any MSH) are handed on as a message of their own, so the parser rejects
them with a reason instead of this reader silently gluing them onto a neighbour.
"""

import logging
import re
from collections.abc import Callable, Iterator
from pathlib import Path

from adapters.hl7v2.framing import END_BLOCK, START_BLOCK

log = logging.getLogger("gasgap.hl7v2.files")
_CHUNK = 1 << 20
# MLLP start and end blocks end a line too, so a frame boundary reads as a blank line.
_LINE_END = re.compile(rb"\r\n|\r|\n|" + re.escape(START_BLOCK) + b"|" + re.escape(END_BLOCK))
_ENVELOPE = (b"FHS", b"BHS", b"BTS", b"FTS")


#: How much of an oversized message is handed to ``on_oversized`` (its first lines),
#: enough to recognise it in quarantine without holding it all.
OVERSIZED_HEAD_BYTES = 64 * 1024


def iter_hl7_file(
    path: Path,
    *,
    max_message_bytes: int = 10_000_000,
    on_oversized: Callable[[int, bytes], None] | None = None,
) -> Iterator[bytes]:
    """Each message in ``path``, as bytes with CR between segments (and a final CR).

    A message longer than ``max_message_bytes`` is skipped with a warning naming the
    file and byte offset (no content is logged); ``on_oversized(offset, head)`` is told
    of it with the message's first ``OVERSIZED_HEAD_BYTES``, so the caller can keep it
    in quarantine.
    """
    current: list[bytes] = []
    size = 0
    oversized_at: int | None = None
    head = b""
    offset = 0

    def flush() -> Iterator[bytes]:
        nonlocal current, size, oversized_at, head
        if oversized_at is not None:
            log.warning(
                "%s: message at byte %d is over %d bytes, skipped",
                path,
                oversized_at,
                max_message_bytes,
            )
            if on_oversized is not None:
                on_oversized(oversized_at, head)
            head = b""
        elif current:
            yield b"\r".join(current) + b"\r"
        current, size, oversized_at = [], 0, None

    for line, line_offset in _lines(path):
        offset = line_offset
        line = line.strip(b" \t")
        if not line or line.startswith(_ENVELOPE):
            yield from flush()
            continue
        if line.startswith(b"MSH"):
            yield from flush()
        if oversized_at is not None:
            continue
        size += len(line) + 1
        if size > max_message_bytes:
            oversized_at = offset
            head = (b"\r".join(current) + b"\r" + line)[:OVERSIZED_HEAD_BYTES]
            current = []
            continue
        current.append(line)
    yield from flush()


def _lines(path: Path) -> Iterator[tuple[bytes, int]]:
    """Lines of the file (any line ending) with their byte offsets, chunk by chunk."""
    pending = b""
    consumed = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            data = pending + chunk
            start = 0
            for match in _LINE_END.finditer(data):
                if match.end() == len(data) and match.group() == b"\r":
                    break  # may be the first half of CRLF: wait for the next chunk
                yield data[start : match.start()], consumed + start
                start = match.end()
            if len(data) - start > 0 and start == 0 and len(data) > 64 * _CHUNK:
                # one enormous line: hand it on in pieces so memory stays bounded
                yield data, consumed
                start = len(data)
            consumed += start
            pending = data[start:]
    if pending:
        yield pending.rstrip(b"\r"), consumed
