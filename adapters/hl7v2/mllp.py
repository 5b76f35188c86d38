"""The MLLP listener: HL7 v2 messages in over TCP (optionally TLS), an ACK for each.

The socket loop is thin: framing is ``framing.MllpFramer``, the answer is
``ack.build_ack``, and what a message means is the callback's business. The callback
is called once per whole message, in the order received on a connection, and returns
its ``AckDecision`` only after the message is durably handled (committed to storage),
so an AA always means "stored": a sender that gets no ACK resends, and the delivery id
makes the resend harmless.

Never crashes on input: an oversized message, a callback exception or a malformed
message each get an AE with the reason, and the connection stays open. Logs carry
the peer address, the message control id, the size and the ACK code, never patient
identifiers or message content.
"""

import asyncio
import inspect
import logging
import ssl as ssl_module
import uuid
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from datetime import UTC, datetime

from adapters.hl7v2.ack import ACK_CODES, Hl7Error, build_ack, recover_header
from adapters.hl7v2.framing import MessageTooLarge, MllpFramer, frame

log = logging.getLogger("gasgap.hl7v2.mllp")
_READ_CHUNK = 65536


@dataclass(frozen=True, slots=True)
class AckDecision:
    """The callback's answer: ``code`` AA, AE or AR, and a short reason for AE/AR."""

    code: str
    text: str = ""


OnMessage = Callable[[bytes], AckDecision] | Callable[[bytes], Awaitable[AckDecision]]


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
    ) -> None:
        self._on_message = on_message
        self._host = host
        self._requested_port = port
        self._max_message_bytes = max_message_bytes
        self._ssl = ssl
        self._read_timeout = read_timeout
        self._max_connections = max_connections
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
        if len(self._connections) >= self._max_connections:
            # A lab system holds a few connections; hundreds mean a fault or an attack.
            # Refusing the extra one keeps file handles for the senders that matter.
            log.warning("MLLP %s: %d connections open, refusing another", peer,
                        len(self._connections))
            writer.close()
            try:
                await writer.wait_closed()
            except (ConnectionError, ssl_module.SSLError):
                pass
            return
        self._connections[task] = False
        framer = MllpFramer(self._max_message_bytes)
        try:
            while not self._stopping:
                try:
                    data = await asyncio.wait_for(reader.read(_READ_CHUNK), self._read_timeout)
                except TimeoutError:
                    log.info("MLLP %s: no data for %ss, closing", peer, self._read_timeout)
                    break
                if not data:
                    break
                await self._take(data, framer, writer, task, peer)
        except (ConnectionError, asyncio.IncompleteReadError) as exc:
            log.info("MLLP %s: connection lost (%s)", peer, type(exc).__name__)
        finally:
            self._connections.pop(task, None)
            writer.close()
            try:
                await writer.wait_closed()
            except (ConnectionError, ssl_module.SSLError):
                pass

    async def _take(self, data: bytes, framer: MllpFramer, writer: asyncio.StreamWriter,
                    task: asyncio.Task[None], peer: object) -> None:
        self._connections[task] = True
        try:
            while True:
                try:
                    messages = framer.feed(data)
                except MessageTooLarge as too_large:
                    for message in too_large.messages:
                        await self._answer(message, writer, peer)
                    log.warning("MLLP %s: message %s refused, over %d bytes", peer,
                                recover_header(too_large.head).control_id or "?",
                                too_large.limit)
                    await self._send(writer, too_large.head, "AE", too_large.reason,
                                     too_large.error_code)
                    data = b""  # the framer kept the rest of the chunk
                    continue
                for message in messages:
                    await self._answer(message, writer, peer)
                return
        finally:
            self._connections[task] = False

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
            code, text = "AE", f"message not stored: {type(exc).__name__}: {exc}"
            log.error("MLLP %s: message %s not stored: %s", peer, control_id,
                      type(exc).__name__)
        log.info("MLLP %s: message %s (%d bytes) -> %s", peer, control_id, len(message), code)
        await self._send(writer, message, code, text, error_code)

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
    async def _send(writer: asyncio.StreamWriter, message: bytes, code: str, text: str,
                    error_code: str | None) -> None:
        now = datetime.now(UTC).strftime("%Y%m%d%H%M%S+0000")
        ack = build_ack(message, code, text, control_id=uuid.uuid4().hex[:20],
                        error_code=error_code, timestamp=now)
        writer.write(frame(ack))
        await writer.drain()
