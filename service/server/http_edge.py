"""The HTTP edge: when a request starts, how long its parts may take, how many connections.

uvicorn's httptools protocol, extended (:func:`protocol_class`):

* **The clock starts at the first byte.** Every ``data_received`` is stamped; the request that
  begins in it carries that stamp as ``scope["state"]["arrival_s"]``, so a plan's deadline
  counts from the moment its first byte was read, not from when the app first sees it.
* **Header timeout.** A connection must complete a request's headers within
  ``header_timeout_s`` of connecting or of that request's first byte; otherwise it gets ``408``
  and is closed. (uvicorn closes idle keep-alive connections, but not one that never sends.)
* **Connection bound.** Above ``max_connections`` open connections, a new one is answered
  ``503`` and closed at once, so slow clients cannot take every descriptor.

The body timeout (``body_timeout_s`` from the end of the headers to the end of the body) is
applied where the body is read: :func:`read_body` (the plans fast path) and the edge
middleware of :mod:`dueroute.service.server.app` (every other endpoint).
"""

from __future__ import annotations

import asyncio
import json
import time
from collections.abc import Awaitable, Callable, MutableMapping
from typing import Any

import uvicorn
from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]


def _raw_response(status: int, reason: str, detail: str) -> bytes:
    body = json.dumps({"detail": detail}).encode()
    return (
        f"HTTP/1.1 {status} {reason}\r\ncontent-type: application/json\r\n"
        f"content-length: {len(body)}\r\nconnection: close\r\n\r\n"
    ).encode() + body


class EdgeHttpProtocol(HttpToolsProtocol):
    """httptools protocol with the first-byte stamp, a header timeout and a connection bound.

    The limits are class attributes; :func:`protocol_class` makes a subclass with the
    service's settings.
    """

    header_timeout_s: float = 5.0
    max_connections: int = 1024

    _rx_s = 0.0
    _header_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        if len(self.connections) > self.max_connections:
            transport.write(
                _raw_response(
                    503,
                    "Service Unavailable",
                    f"too many open connections (limit {self.max_connections}); retry shortly",
                )
            )
            transport.close()
            return
        self._arm_header_timer()

    def _arm_header_timer(self) -> None:
        if self._header_timer is None:
            self._header_timer = self.loop.call_later(self.header_timeout_s, self._headers_late)

    def _headers_late(self) -> None:
        self._header_timer = None
        if self.transport.is_closing():
            return
        cycle = self.cycle
        if cycle is not None and not cycle.response_complete:
            # the previous request's answer is still being made while the next one's headers
            # arrive (pipelining, keep-alive): give those headers their time again
            self._arm_header_timer()
            return
        self.transport.write(
            _raw_response(
                408,
                "Request Timeout",
                f"the request's headers did not arrive within {self.header_timeout_s:g} s",
            )
        )
        self.transport.close()

    def data_received(self, data: bytes) -> None:
        self._rx_s = time.perf_counter()
        super().data_received(data)

    def on_message_begin(self) -> None:
        super().on_message_begin()
        self.scope["state"]["arrival_s"] = self._rx_s
        self._arm_header_timer()

    def on_headers_complete(self) -> None:
        timer, self._header_timer = self._header_timer, None
        if timer is not None:
            timer.cancel()
        super().on_headers_complete()

    def connection_lost(self, exc: Exception | None) -> None:
        timer, self._header_timer = self._header_timer, None
        if timer is not None:
            timer.cancel()
        super().connection_lost(exc)


def protocol_class(header_timeout_s: float, max_connections: int) -> type[EdgeHttpProtocol]:
    """An :class:`EdgeHttpProtocol` subclass with these limits (uvicorn's ``http=``)."""
    return type(
        "DuerouteHttpProtocol",
        (EdgeHttpProtocol,),
        {"header_timeout_s": header_timeout_s, "max_connections": max_connections},
    )


def server_config(app: Any, settings: Any, **overrides: Any) -> uvicorn.Config:
    """The uvicorn configuration of ``dueroute serve`` (tests start servers with it too)."""
    options: dict[str, Any] = {
        "host": settings.host,
        "port": settings.port,
        "log_config": None,
        "access_log": False,  # the service writes its own structured request log
        "lifespan": "on",
        "timeout_graceful_shutdown": 5,
        "http": protocol_class(settings.header_timeout_s, settings.max_connections),
        "loop": "auto",  # uvloop where installed
    }
    options.update(overrides)
    return uvicorn.Config(app, **options)


class BodyTimeout(Exception):
    """The body did not arrive in time (answered 408)."""


class BodyTooLarge(Exception):
    """The body is larger than the endpoint's limit (answered 413)."""

    def __init__(self, size: int, limit: int) -> None:
        super().__init__(
            f"request body is {size} bytes or more; the limit for this endpoint is {limit} bytes"
        )


class Disconnected(Exception):
    """The client went away before its body arrived."""


async def read_body(receive: Receive, limit: int, timeout_s: float) -> bytes:
    """The whole request body, within ``limit`` bytes and ``timeout_s`` seconds."""
    chunks: list[bytes] = []
    size = 0
    try:
        async with asyncio.timeout(timeout_s):
            while True:
                message = await receive()
                if message["type"] == "http.disconnect":
                    raise Disconnected
                chunk = message.get("body", b"")
                size += len(chunk)
                if size > limit:
                    raise BodyTooLarge(size, limit)
                chunks.append(chunk)
                if not message.get("more_body", False):
                    return b"".join(chunks)
    except TimeoutError:
        raise BodyTimeout from None


async def wait_disconnect(receive: Receive) -> None:
    """Return when the client hangs up (the body was read already)."""
    while True:
        message = await receive()
        if message["type"] == "http.disconnect":
            return
