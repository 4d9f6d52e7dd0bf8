"""A lean HTTP/1.1 client for the load tester's plan requests (RFC 9112 message framing).

The load tester shares this machine's cores with the service it measures, so every
millisecond of CPU it spends per request is taken from the service and added to the latency
it reports. A general client (httpx) costs about 1-2 ms of Python per request here; this one
sends one pre-encoded request on a kept-alive connection and reads a ``Content-Length`` body,
a small fraction of that. It speaks only what the service answers: no chunked bodies, no
redirects, no TLS (the load tester talks to loopback only).
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from typing import Any
from urllib.parse import urlsplit

import orjson

#: A kept-alive connection idle for longer is not reused (uvicorn closes idle connections
#: after 5 s by default; a request sent on a connection the server is closing is lost).
MAX_IDLE_S = 2.0


class LeanHTTPError(OSError):
    """The connection failed or the answer was not HTTP/1.1 with a Content-Length body."""


class LeanResponse:
    __slots__ = ("status_code", "headers", "content")

    def __init__(self, status_code: int, headers: dict[str, str], content: bytes) -> None:
        self.status_code = status_code
        self.headers = headers
        self.content = content

    def json(self) -> Any:
        return orjson.loads(self.content)

    @property
    def text(self) -> str:
        return self.content.decode("utf-8", errors="replace")


class LeanClient:
    """Kept-alive connections to one ``http://host:port`` (one per request in flight)."""

    def __init__(self, base_url: str, user_agent: str = "dueroute-loadtest") -> None:
        parts = urlsplit(base_url)
        if parts.scheme != "http" or parts.hostname is None:
            raise ValueError(f"the lean client speaks plain http only, got {base_url!r}")
        self.host = parts.hostname
        self.port = parts.port or 80
        self._head = f"Host: {parts.netloc}\r\nUser-Agent: {user_agent}\r\n"
        #: kept-alive connections and when they went idle
        self._idle: list[tuple[asyncio.StreamReader, asyncio.StreamWriter, float]] = []

    async def post(self, path: str, json: Any, timeout: float) -> LeanResponse:
        body = orjson.dumps(json)
        request = (
            f"POST {path} HTTP/1.1\r\n{self._head}Content-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\n\r\n"
        ).encode() + body
        conn = None
        now = time.monotonic()
        while self._idle and conn is None:
            reader, writer, since = self._idle.pop()
            if now - since < MAX_IDLE_S:
                conn = (reader, writer)
            else:  # the server may have closed it (its keep-alive timeout): never reuse
                _close(writer)
        try:
            async with asyncio.timeout(timeout):
                if conn is None:
                    conn = await asyncio.open_connection(self.host, self.port)
                reader, writer = conn
                writer.write(request)
                head = await reader.readuntil(b"\r\n\r\n")
                status, headers = _parse_head(head)
                length = headers.get("content-length")
                if length is None:
                    raise LeanHTTPError("answer without Content-Length")
                if not length.isdigit():
                    raise LeanHTTPError(f"answer with Content-Length {length[:40]!r}")
                content = await reader.readexactly(int(length))
        except (asyncio.IncompleteReadError, asyncio.LimitOverrunError, ConnectionError) as exc:
            if conn is not None:
                _close(conn[1])
            raise LeanHTTPError(f"{type(exc).__name__}: {exc}") from None
        except BaseException:
            if conn is not None:
                _close(conn[1])
            raise
        if headers.get("connection", "").lower() == "close":
            _close(writer)
        else:
            self._idle.append((reader, writer, time.monotonic()))
        return LeanResponse(status, headers, content)

    async def aclose(self) -> None:
        idle, self._idle = self._idle, []
        for _, writer, _since in idle:
            _close(writer)
            with contextlib.suppress(Exception):
                await writer.wait_closed()


def _parse_head(head: bytes) -> tuple[int, dict[str, str]]:
    lines = head.decode("latin-1").split("\r\n")
    parts = lines[0].split(" ", 2)
    if len(parts) < 2 or not parts[0].startswith("HTTP/1.") or not parts[1].isdigit():
        raise LeanHTTPError(f"not an HTTP/1.1 status line: {lines[0][:80]!r}")
    headers: dict[str, str] = {}
    for line in lines[1:]:
        name, sep, value = line.partition(":")
        if sep:
            headers[name.strip().lower()] = value.strip()
    return int(parts[1]), headers


def _close(writer: asyncio.StreamWriter) -> None:
    with contextlib.suppress(Exception):
        writer.close()
