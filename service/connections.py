"""uvicorn's HTTP protocol (httptools) with two limits it lacks: time and size of a request head.

uvicorn closes a kept-alive connection that stays idle (``timeout_keep_alive``), but nothing limits how long a
client may take to send a request line and headers, or a new connection that sends nothing at all; and the
httptools parser buffers a header of any length. A client dripping one header byte a second would hold a
connection (and its memory) for as long as it likes. This subclass arms a timer when a connection opens and
when a request begins, cancels it when the head is complete, and closes the connection when it fires or when
the head grows past a byte limit. The body has its own limit (``service.middleware.BodyReadTimeout``).

It overrides asyncio's ``connection_made``/``connection_lost``/``data_received`` and httptools' parser
callbacks ``on_message_begin``/``on_url``/``on_header``/``on_headers_complete``, each calling uvicorn's own
(``on_headers_complete`` skips it for an oversized head, so the request never reaches the application).
"""

from __future__ import annotations

import asyncio

from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol


class HeadLimitedProtocol(HttpToolsProtocol):
    head_timeout_seconds: float = 10.0
    max_head_bytes: int = 64 * 1024

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        self._head_timer: asyncio.TimerHandle | None = None
        self._raw_head_bytes = self._head_bytes = 0
        self._reading_head = True
        super().connection_made(transport)
        self._arm_head_timer()      # a connection that opens and sends nothing is closed too

    def connection_lost(self, exc: Exception | None) -> None:
        self._cancel_head_timer()
        super().connection_lost(exc)

    def data_received(self, data: bytes) -> None:
        # Two counts. Raw bytes received while the head is still incomplete after parsing a chunk (a chunk may
        # also hold the start of the body, so it is counted only then): this bounds what the parser buffers
        # for a head that never ends. And the parsed URL and header bytes (on_url, on_header): this catches a
        # complete but oversized head that arrived in one read.
        super().data_received(data)
        if self._reading_head and not self.transport.is_closing():
            self._raw_head_bytes += len(data)
            if self._raw_head_bytes > self.max_head_bytes:
                self._close()

    def on_message_begin(self) -> None:
        super().on_message_begin()
        self._reading_head = True
        self._raw_head_bytes = self._head_bytes = 0
        self._arm_head_timer()

    def on_url(self, url: bytes) -> None:
        self._head_bytes += len(url)
        super().on_url(url)

    def on_header(self, name: bytes, value: bytes) -> None:
        self._head_bytes += len(name) + len(value) + 4
        super().on_header(name, value)

    def on_headers_complete(self) -> None:
        self._reading_head = False
        self._cancel_head_timer()
        if self._head_bytes > self.max_head_bytes:
            self._close()               # never reaches the application
            return
        super().on_headers_complete()

    def _arm_head_timer(self) -> None:
        if self._head_timer is None:
            self._head_timer = self.loop.call_later(self.head_timeout_seconds, self._close)

    def _cancel_head_timer(self) -> None:
        if self._head_timer is not None:
            self._head_timer.cancel()
            self._head_timer = None

    def _close(self) -> None:
        self._cancel_head_timer()
        if not self.transport.is_closing():
            self.transport.close()


class SettingsHeadLimitedProtocol(HeadLimitedProtocol):
    """The protocol that worker processes name by import string (a class made by ``head_limited_protocol``
    cannot be sent to a spawned worker): its limits are read from the worker's own settings."""

    def __init__(self, *args, **kwargs) -> None:
        from service.settings import get_settings

        settings = get_settings()
        self.head_timeout_seconds = settings.header_read_timeout_seconds
        self.max_head_bytes = settings.max_header_bytes
        super().__init__(*args, **kwargs)


WORKER_PROTOCOL = f"{__name__}:{SettingsHeadLimitedProtocol.__name__}"


def head_limited_protocol(timeout_seconds: float, max_bytes: int) -> type[HeadLimitedProtocol]:
    """The protocol class for ``uvicorn.run(http=...)`` with these limits."""
    return type("ConfiguredHeadLimitedProtocol", (HeadLimitedProtocol,),
                {"head_timeout_seconds": timeout_seconds, "max_head_bytes": max_bytes})
