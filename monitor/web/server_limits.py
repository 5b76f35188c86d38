"""HTTP connection limits the ASGI server does not set by itself.

uvicorn closes a keep-alive connection idle between requests, but nothing closes one
that sends its request headers a byte at a time: 300 such connections stay open as
long as their senders like. ``HeaderTimeoutH11Protocol`` gives each request
``HEADER_TIMEOUT_S`` seconds from its first byte (or from the previous response) to
finish its headers, then closes the connection without an answer. Pass the class to
``uvicorn.Config(http=...)`` where the server is started (``monitor/service.py``).
"""

from __future__ import annotations

import asyncio
from typing import Any

from uvicorn.protocols.http.h11_impl import H11Protocol

#: Seconds a client has to send a request's headers (common practice, no source:
#: reverse proxies default to 60 s; a monitoring service on a hospital network needs less).
HEADER_TIMEOUT_S = 10.0


class HeaderTimeoutH11Protocol(H11Protocol):
    """uvicorn's h11 protocol, closing a connection whose request headers are late."""

    header_timeout: float = HEADER_TIMEOUT_S

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._header_timer: asyncio.TimerHandle | None = None

    def _arm_header_timer(self) -> None:
        self._disarm_header_timer()
        self._header_timer = self.loop.call_later(self.header_timeout, self._headers_late)

    def _disarm_header_timer(self) -> None:
        if self._header_timer is not None:
            self._header_timer.cancel()
            self._header_timer = None

    def _headers_late(self) -> None:
        self._header_timer = None
        if not self.transport.is_closing():
            self.logger.info(
                "HTTP request headers not complete in %ss: closing", self.header_timeout
            )
            self.transport.close()

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._arm_header_timer()

    def data_received(self, data: bytes) -> None:
        super().data_received(data)
        if self.cycle is not None and not self.cycle.response_complete:
            self._disarm_header_timer()  # the headers are in: the request is running

    def on_response_complete(self) -> None:
        super().on_response_complete()
        if not self.transport.is_closing():
            self._arm_header_timer()  # the next request on this connection gets its own

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm_header_timer()
        super().connection_lost(exc)
