"""The MLLP listener: HL7 v2 messages in over TCP (optionally TLS), an ACK for each.

The socket loop is thin: framing is ``framing.MllpFramer``, the answer is
``ack.build_ack``, and what a message means is the callback's business. The callback
is called once per whole message, in the order received on a connection, and returns
its ``AckDecision`` only after the message is durably handled (committed to storage).

What each answer means (HL7 v2 original acknowledgement mode, Table 0008):

- ``AA``: stored. A resend of a stored message is harmless (the delivery id).
- ``AE``: the message itself is wrong (unreadable, over the size limit, no result
  readable) and is kept in quarantine with the reason; resending it unchanged fails
  again, so a sender should not.
- ``AR`` with ERR code 207: gasgap could not process it now (the database is down or
  locked); nothing was kept, resend later.
- ``AR`` with ERR code 200/201/203: a message type, event or version gasgap does not
  take (kept in quarantine).
- no ACK (connection closed, deadline passed): nothing is promised; resend.

Never crashes on input. An exception from the callback is answered ``AR`` when it is
a storage outage (``is_transient``); any other is handed to ``on_failure`` to keep the
message in quarantine (then ``AE``), or answered ``AR`` when that fails too. ACK text
never carries an exception's own text (a database driver's message, a link).

Limits, so no one sender can lock the others out: ``max_connections`` in all and
``max_connections_per_peer`` from one address (more are closed at once); a
connection must complete each message within ``message_deadline`` seconds of its first
byte (a sender trickling bytes is cut off; it did not get an ACK, so it resends); a
connection silent for ``read_timeout`` is closed. Logs carry the peer address, the
message control id, the size and the ACK code, never patient identifiers or content.
"""

import asyncio
import inspect
import logging
import ssl as ssl_module
import time
import uuid
from collections import Counter
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from datetime import UTC, datetime

from adapters.hl7v2.ack import ACK_CODES, Hl7Error, build_ack, recover_header
from adapters.hl7v2.framing import MessageTooLarge, MllpFramer, frame
from monitor.engine.errors import Unavailable

log = logging.getLogger("gasgap.hl7v2.mllp")
_READ_CHUNK = 65536


@dataclass(frozen=True, slots=True)
class AckDecision:
    """The callback's answer: ``code`` AA, AE or AR, and a short reason for AE/AR."""

    code: str
    text: str = ""


OnMessage = Callable[[bytes], AckDecision] | Callable[[bytes], Awaitable[AckDecision]]
#: Keeps a refused message (or the head of one) with the reason; raises if it cannot.
OnRefused = Callable[[bytes, str], None]

#: Answer for a message gasgap could not process now (storage down or locked).
NOT_NOW = "not stored: gasgap cannot store messages at the moment; resend later"
#: Answer for a message that broke the reader in a way it did not foresee, once kept.
KEPT_FOR_REVIEW = "could not be processed; kept in quarantine for review"


def is_transient(exc: BaseException) -> bool:
    """True for a failure that a later attempt may not meet: anything gasgap raises as
    ``Unavailable`` (``storage.errors.StorageUnavailable``: the database down, locked,
    restarting, timing out, its pool full), anywhere in the exception's chain, or an
    OS-level connection failure."""
    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:
        seen.add(id(current))
        if isinstance(current, (Unavailable, OSError, TimeoutError)):
            return True
        current = current.__cause__ or current.__context__
    return False


def _peer_host(peer: object) -> str:
    if isinstance(peer, tuple) and peer:
        return str(peer[0])
    return str(peer)


class MllpListener:
    """Accepts MLLP connections and answers each message with an ACK.

    ``port=0`` binds a free port; read ``.port`` after ``start()``. Bind to loopback
    unless the deployment puts TLS (``ssl``) or a trusted network in front.
    """

    def __init__(
        self,
        on_message: OnMessage,
        *,
        host: str = "127.0.0.1",
        port: int = 0,
        max_message_bytes: int = 10_000_000,
        ssl: ssl_module.SSLContext | None = None,
        read_timeout: float = 300,
        max_connections: int = 64,
        max_connections_per_peer: int = 8,
        message_deadline: float = 60,
        on_refused: OnRefused | None = None,
        is_transient: Callable[[BaseException], bool] = is_transient,
    ) -> None:
        self._on_message = on_message
        self._host = host
        self._requested_port = port
        self._max_message_bytes = max_message_bytes
        self._ssl = ssl
        self._read_timeout = read_timeout
        self._max_connections = max_connections
        self._max_per_peer = max_connections_per_peer
        self._message_deadline = message_deadline
        self._on_refused = on_refused
        self._is_transient = is_transient
        self._per_peer: Counter[str] = Counter()
        self._server: asyncio.Server | None = None
        self._connections: dict[asyncio.Task[None], bool] = {}  # task -> busy with a message
        self._stopping = False
        self.port: int | None = None

    async def start(self) -> None:
        self._stopping = False
        self._server = await asyncio.start_server(
            self._serve, self._host, self._requested_port, ssl=self._ssl
        )
        self.port = self._server.sockets[0].getsockname()[1]
        log.info("MLLP listener on %s:%s (tls=%s)", self._host, self.port, self._ssl is not None)

    async def stop(self) -> None:
        """Stop accepting; let connections finish the messages they hold, then close."""
        self._stopping = True
        if self._server is not None:
            self._server.close()
        for task, busy in list(self._connections.items()):
            if not busy:
                task.cancel()
        if self._connections:
            await asyncio.gather(*self._connections, return_exceptions=True)
        if self._server is not None:
            await self._server.wait_closed()
            self._server = None
        log.info("MLLP listener on %s:%s stopped", self._host, self.port)

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        task = asyncio.current_task()
        assert task is not None  # always set inside a running task
        peer = writer.get_extra_info("peername")
        host = _peer_host(peer)
        refuse = ""
        if len(self._connections) >= self._max_connections:
            # A lab system holds a few connections; hundreds mean a fault or an attack.
            # Refusing the extra one keeps file handles for the senders that matter.
            refuse = f"{len(self._connections)} connections open"
        elif self._per_peer[host] >= self._max_per_peer:
            # One address may not take the whole cap: the other senders keep their way in.
            refuse = f"{self._per_peer[host]} connections open from this address"
        if refuse:
            log.warning("MLLP %s: %s, refusing another", peer, refuse)
            await _close(writer)
            return
        self._connections[task] = False
        self._per_peer[host] += 1
        framer = MllpFramer(self._max_message_bytes)
        pending_since: float | None = None  # first byte after the last whole message
        try:
            while not self._stopping:
                wait = self._read_timeout
                if pending_since is not None:
                    wait = min(wait, pending_since + self._message_deadline - time.monotonic())
                    if wait <= 0:
                        log.warning(
                            "MLLP %s: no whole message within %ss of its first byte, "
                            "closing (no ACK: the sender resends)",
                            peer,
                            self._message_deadline,
                        )
                        break
                try:
                    data = await asyncio.wait_for(reader.read(_READ_CHUNK), wait)
                except TimeoutError:
                    if pending_since is not None:
                        continue  # the deadline check above closes it
                    log.info("MLLP %s: no data for %ss, closing", peer, self._read_timeout)
                    break
                if not data:
                    break
                if pending_since is None:
                    pending_since = time.monotonic()
                answered = await self._take(data, framer, writer, task, peer)
                if answered and not framer.in_message:
                    pending_since = None
                elif answered:
                    pending_since = time.monotonic()  # the next message began in this chunk
        except (ConnectionError, asyncio.IncompleteReadError) as exc:
            log.info("MLLP %s: connection lost (%s)", peer, type(exc).__name__)
        finally:
            self._connections.pop(task, None)
            self._per_peer[host] -= 1
            if self._per_peer[host] <= 0:
                del self._per_peer[host]
            await _close(writer)

    async def _take(
        self,
        data: bytes,
        framer: MllpFramer,
        writer: asyncio.StreamWriter,
        task: asyncio.Task[None],
        peer: object,
    ) -> int:
        """Feed ``data`` to the framer and answer each whole message; how many."""
        self._connections[task] = True
        answered = 0
        try:
            while True:
                try:
                    messages = framer.feed(data)
                except MessageTooLarge as too_large:
                    for message in too_large.messages:
                        await self._answer(message, writer, peer)
                        answered += 1
                    await self._refuse_oversized(too_large, writer, peer)
                    answered += 1
                    data = b""  # the framer kept the rest of the chunk
                    continue
                for message in messages:
                    await self._answer(message, writer, peer)
                    answered += 1
                return answered
        finally:
            self._connections[task] = False

    async def _refuse_oversized(
        self, too_large: MessageTooLarge, writer: asyncio.StreamWriter, peer: object
    ) -> None:
        control_id = recover_header(too_large.head).control_id or "?"
        log.warning("MLLP %s: message %s refused, over %d bytes", peer, control_id, too_large.limit)
        text = too_large.reason
        if self._on_refused is not None:
            try:
                await asyncio.to_thread(self._on_refused, too_large.head, too_large.reason)
                text += "; its first bytes are kept in quarantine"
            except Exception as exc:  # storage down: say so, the answer stays AE
                log.error(
                    "MLLP %s: head of message %s not kept: %s", peer, control_id, type(exc).__name__
                )
                text += "; not kept (storage unavailable)"
        await self._send(writer, too_large.head, "AE", text, too_large.error_code)

    async def _answer(self, message: bytes, writer: asyncio.StreamWriter, peer: object) -> None:
        control_id = recover_header(message).control_id or "?"
        error_code: str | None = None
        try:
            decision = await self._call(message)
            if decision.code not in ACK_CODES:
                raise ValueError(f"callback answered {decision.code!r}, not AA, AE or AR")
            code, text = decision.code, decision.text
        except Hl7Error as exc:
            code, text, error_code = exc.ack_code, exc.reason, exc.error_code
        except Exception as exc:  # the listener must outlive any failure of the callback
            code, text, error_code = await self._after_failure(message, exc, peer, control_id)
        log.info("MLLP %s: message %s (%d bytes) -> %s", peer, control_id, len(message), code)
        await self._send(writer, message, code, text, error_code)

    async def _after_failure(
        self, message: bytes, exc: Exception, peer: object, control_id: str
    ) -> tuple[str, str, str]:
        """AR for an outage (the sender retries); otherwise keep the message and AE."""
        name = type(exc).__name__
        if self._is_transient(exc):
            log.error(
                "MLLP %s: message %s not stored, storage unavailable (%s): AR",
                peer,
                control_id,
                name,
            )
            return "AR", NOT_NOW, "207"
        log.error("MLLP %s: message %s failed in processing (%s)", peer, control_id, name)
        if self._on_refused is not None:
            try:
                await asyncio.to_thread(
                    self._on_refused, message, f"processing failed unexpectedly ({name})"
                )
                return "AE", KEPT_FOR_REVIEW, "207"
            except Exception as again:
                log.error(
                    "MLLP %s: message %s not kept either (%s)",
                    peer,
                    control_id,
                    type(again).__name__,
                )
        return "AR", NOT_NOW, "207"

    async def _call(self, message: bytes) -> AckDecision:
        if inspect.iscoroutinefunction(self._on_message):
            result = await self._on_message(message)
        else:
            result = await asyncio.to_thread(self._on_message, message)
            if inspect.isawaitable(result):
                result = await result
        if not isinstance(result, AckDecision):
            raise TypeError(f"callback returned {type(result).__name__}, not AckDecision")
        return result

    @staticmethod
    async def _send(
        writer: asyncio.StreamWriter, message: bytes, code: str, text: str, error_code: str | None
    ) -> None:
        now = datetime.now(UTC).strftime("%Y%m%d%H%M%S+0000")
        ack = build_ack(
            message,
            code,
            text,
            control_id=uuid.uuid4().hex[:20],
            error_code=error_code,
            timestamp=now,
        )
        writer.write(frame(ack))
        await writer.drain()


async def _close(writer: asyncio.StreamWriter) -> None:
    writer.close()
    try:
        await writer.wait_closed()
    except (ConnectionError, ssl_module.SSLError):
        pass
