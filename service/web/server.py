"""The HTTP protocol ``tallyward serve`` runs: uvicorn's httptools protocol with a deadline
for request headers and a cap on their size.

uvicorn closes a keep-alive connection that stays idle after a response
(``timeout_keep_alive``), but it waits without end for a new connection's first request and
for headers sent a few bytes at a time, and it keeps every header byte it is sent. Here a
connection must complete each request's headers within ``http_header_timeout_s`` (counted
from the connection's opening, or from the request's first byte) and within
``http_max_header_bytes``; otherwise it gets 408 or 431 and is closed. The body has its own
deadline in ``service.web.app.BodyLimit``.
"""

from __future__ import annotations

import asyncio
from typing import Any

from service.config import get_settings

try:
    from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol
except ImportError:  # pragma: no cover - httptools comes with uvicorn[standard]
    HttpToolsProtocol = None  # type: ignore[assignment,misc]

REASONS = {408: b"Request Timeout", 431: b"Request Header Fields Too Large"}


def protocol() -> str:
    """The ``http`` argument for uvicorn: the guarded protocol, or h11 (whose own
    ``h11_max_incomplete_event_size`` caps headers) where httptools is missing."""
    return "service.web.server:GuardedHttpToolsProtocol" if HttpToolsProtocol is not None else "h11"


if HttpToolsProtocol is not None:

    class GuardedHttpToolsProtocol(HttpToolsProtocol):  # type: ignore[misc,valid-type]
        """HttpToolsProtocol with a header deadline and a header size cap."""

        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            settings = get_settings()
            self.header_timeout_s = settings.http_header_timeout_s
            self.max_header_bytes = settings.http_max_header_bytes
            self._header_deadline: asyncio.TimerHandle | None = None
            self._reading_headers = True
            self._raw_header_bytes = 0  # bytes received while a request's headers are open
            self._parsed_header_bytes = 0  # request line and headers parsed so far
            self._refused = False

        def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
            super().connection_made(transport)
            self._arm_header_deadline()

        def connection_lost(self, exc: Exception | None) -> None:
            self._disarm_header_deadline()
            super().connection_lost(exc)

        def data_received(self, data: bytes) -> None:
            if self._refused:
                return
            super().data_received(data)
            if self._refused or self.transport.is_closing():
                return
            if self._reading_headers:
                self._raw_header_bytes += len(data)
                if max(self._raw_header_bytes, self._parsed_header_bytes) > self.max_header_bytes:
                    self._refuse_oversized_headers()
                    return
            if self._header_deadline is None and self._idle():
                # Bytes between requests that start none (blank lines) still owe a request.
                self._arm_header_deadline()

        def on_message_begin(self) -> None:
            super().on_message_begin()
            self._reading_headers = True
            self._raw_header_bytes = self._parsed_header_bytes = 0
            self._arm_header_deadline()

        def on_url(self, url: bytes) -> None:
            self._parsed_header_bytes += len(url)
            super().on_url(url)

        def on_header(self, name: bytes, value: bytes) -> None:
            self._parsed_header_bytes += len(name) + len(value) + 4
            super().on_header(name, value)

        def on_headers_complete(self) -> None:
            self._reading_headers = False
            self._disarm_header_deadline()
            if self._parsed_header_bytes > self.max_header_bytes:
                self._refuse_oversized_headers()
                return
            super().on_headers_complete()

        def on_body(self, body: bytes) -> None:
            if not self._refused:
                super().on_body(body)

        def on_message_complete(self) -> None:
            if not self._refused:
                super().on_message_complete()

        def _idle(self) -> bool:
            return self.cycle is None or self.cycle.response_complete

        def _arm_header_deadline(self) -> None:
            if self._header_deadline is None:
                self._header_deadline = self.loop.call_later(self.header_timeout_s,
                                                              self._headers_overdue)

        def _disarm_header_deadline(self) -> None:
            if self._header_deadline is not None:
                self._header_deadline.cancel()
                self._header_deadline = None

        def _headers_overdue(self) -> None:
            self._header_deadline = None
            if self.transport.is_closing():
                return
            if not self._idle():
                # A pipelined request is incomplete behind one in progress: finish that one,
                # then close.
                self.cycle.keep_alive = False
                return
            if self._raw_header_bytes:
                self._refuse(408, f"request headers did not arrive within "
                                  f"{self.header_timeout_s:g} seconds")
            else:
                self.transport.close()

        def _refuse_oversized_headers(self) -> None:
            self._refuse(431, f"request line and headers are over the "
                              f"{self.max_header_bytes:,}-byte limit")

        def _refuse(self, status: int, message: str) -> None:
            self._refused = True
            self._disarm_header_deadline()
            body = message.encode()
            self.transport.write(b"".join([
                b"HTTP/1.1 %d %s\r\n" % (status, REASONS[status]),
                b"content-type: text/plain; charset=utf-8\r\n",
                b"content-length: %d\r\n" % len(body), b"connection: close\r\n\r\n", body]))
            self.transport.close()
