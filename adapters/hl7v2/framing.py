"""MLLP framing, sans I/O: bytes in, whole messages out.

The Minimal Lower Layer Protocol (HL7 v2 implementation guide, appendix C) wraps each
message as ``<VT> message <FS><CR>``. This module is the only place that knows those
bytes; the socket loop in ``mllp.py`` and the file reader in ``files.py`` use it.

Tolerance, because feeds are rarely perfect: bytes outside a frame (stray newlines
between frames, noise before the first start block) are dropped; the CR after the end
block is optional; a start block inside an unfinished message means the sender gave
up on it and started again, so the unfinished part is dropped.
"""

from adapters.hl7v2.ack import Hl7Error

START_BLOCK = b"\x0b"
END_BLOCK = b"\x1c"
CARRIAGE_RETURN = b"\x0d"
_HEAD_KEPT = 4096


class MessageTooLarge(Hl7Error):
    """A framed message grew past the limit; it is being discarded.

    ``head`` holds its first bytes (enough to read MSH for the ACK); ``messages`` the
    whole messages completed in the same ``feed`` call before it, so none is lost.
    The framer keeps the rest of the data: call ``feed(b"")`` to go on.
    """

    def __init__(self, limit: int, head: bytes, messages: list[bytes]) -> None:
        super().__init__(
            f"message longer than the limit of {limit} bytes: refused unread", "AE", "207"
        )
        self.limit = limit
        self.head = head
        self.messages = messages


def frame(message: bytes) -> bytes:
    """Wrap one message for MLLP."""
    return START_BLOCK + message + END_BLOCK + CARRIAGE_RETURN


class MllpFramer:
    """Turns a byte stream into whole messages, however the stream was split.

    >>> f = MllpFramer(); f.feed(b"\\x0bMSH|...\\x1c"); f.feed(b"\\r")
    [b'MSH|...']
    []
    """

    def __init__(self, max_message_bytes: int = 10_000_000) -> None:
        if max_message_bytes < 1:
            raise ValueError(f"max_message_bytes must be positive, not {max_message_bytes}")
        self.max_message_bytes = max_message_bytes
        self._buffer = bytearray()
        self._in_message = False
        self._discarding = False
        self._pending = b""
        #: bytes dropped so far (outside frames, abandoned or oversized messages)
        self.discarded_bytes = 0

    @property
    def in_message(self) -> bool:
        """True while part of a message has arrived and its end has not."""
        return self._in_message or self._discarding

    def feed(self, data: bytes) -> list[bytes]:
        """Take the next bytes; return the messages they complete (without framing).

        Raises MessageTooLarge when the message in progress passes the limit.
        """
        data = self._pending + bytes(data)
        self._pending = b""
        done: list[bytes] = []
        pos = 0
        while pos < len(data):
            if self._discarding or not self._in_message:
                start = data.find(START_BLOCK, pos)
                if start < 0:
                    self.discarded_bytes += len(data) - pos
                    break
                self.discarded_bytes += start - pos
                self._discarding = False
                self._in_message = True
                self._buffer.clear()
                pos = start + 1
                continue
            end = data.find(END_BLOCK, pos)
            restart = data.find(START_BLOCK, pos, end if end >= 0 else len(data))
            if restart >= 0:  # sender started again before finishing: drop the unfinished part
                self.discarded_bytes += len(self._buffer) + restart - pos
                self._buffer.clear()
                pos = restart + 1
                continue
            stop = end if end >= 0 else len(data)
            if len(self._buffer) + stop - pos > self.max_message_bytes:
                head = bytes(self._buffer[:_HEAD_KEPT])
                if len(head) < _HEAD_KEPT:
                    head += data[pos : pos + _HEAD_KEPT - len(head)]
                self.discarded_bytes += len(self._buffer) + stop - pos
                self._buffer.clear()
                self._in_message = False
                self._discarding = end < 0  # the rest of it is still to come
                self._pending = data[stop + 1 :] if end >= 0 else b""
                raise MessageTooLarge(self.max_message_bytes, head, done)
            self._buffer += data[pos:stop]
            if end < 0:
                break
            done.append(bytes(self._buffer))
            self._buffer.clear()
            self._in_message = False
            pos = end + 1
        return done
