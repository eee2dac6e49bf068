"""A small read-only HTTP/1.1 endpoint on asyncio: GET a path, get (status code, body, content type).

The daemon serves ``/healthz`` and ``/metrics`` with it. Each route is a function without
arguments; the query string is ignored. Every connection carries one request and is closed
after the answer (``Connection: close``).

Whatever arrives, the endpoint answers with a status code or closes the connection, and logs at
most one line per kind of refusal every few seconds (never a traceback); the routes keep
answering. The limits (RFC 9112, HTTP/1.1 message syntax; RFC 9110, HTTP semantics; RFC 6585
section 5 for 431):

* the request line at most :data:`MAX_LINE` bytes, else ``414 URI Too Long``; a header line at most
  :data:`MAX_LINE` bytes, at most :data:`MAX_HEADERS` header lines and :data:`MAX_HEAD` bytes of
  head in all, else ``431 Request Header Fields Too Large``;
* the whole request head within :data:`READ_TIMEOUT` seconds (not per line: a client that sends a
  byte every few seconds is cut off all the same), else ``408 Request Timeout``;
* a request line of three parts (method, target, ``HTTP/1.x``) and header lines ``name: value``,
  else ``400 Bad Request``; another HTTP version ``505``;
* only ``GET`` and ``HEAD``, else ``405 Method Not Allowed`` with ``Allow: GET, HEAD``; no request
  content (``Content-Length`` above 0 or ``Transfer-Encoding``), else ``413 Content Too Large``;
* at most :data:`MAX_CONNECTIONS` connections at once (more are closed at once), and an answer
  the client does not read within :data:`WRITE_TIMEOUT` seconds is dropped.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from spanwatch.connectors.ratelog import RateLimitedLog

Route = Callable[[], tuple[int, bytes, str]]

READ_TIMEOUT = 5.0  # seconds for the whole request head
WRITE_TIMEOUT = 5.0  # seconds for the client to take the answer
MAX_LINE = 8192  # bytes of the request line or of one header line
MAX_HEADERS = 100  # header lines
MAX_HEAD = 65536  # bytes of the whole request head
MAX_CONNECTIONS = 64

_REASONS = {200: "OK", 400: "Bad Request", 404: "Not Found", 405: "Method Not Allowed", 408: "Request Timeout",
            413: "Content Too Large", 414: "URI Too Long", 431: "Request Header Fields Too Large",
            500: "Internal Server Error", 503: "Service Unavailable", 505: "HTTP Version Not Supported"}
_TOKEN = re.compile(rb"^[!#$%&'*+\-.^_`|~0-9A-Za-z]+$")  # RFC 9110 section 5.6.2, tchar
_VERSION = re.compile(rb"^HTTP/(\d)\.(\d)$")

log = logging.getLogger("spanwatch.http")


class _Refuse(Exception):
    """A request answered with an error status (and logged, rate-limited, under ``reason``)."""

    def __init__(self, code: int, reason: str) -> None:
        super().__init__(reason)
        self.code, self.reason = code, reason


@dataclass
class HttpEndpoint:
    server: asyncio.Server
    host: str
    port: int
    refused: dict[str, int] = field(default_factory=dict)  # reason -> requests answered with an error

    @property
    def address(self) -> str:
        return f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"

    async def close(self) -> None:
        self.server.close()
        await self.server.wait_closed()


def parse_address(address: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[::1]:PORT`` for IPv6; an empty host is 127.0.0.1; port 0: any free one) -> (host, port).

    >>> parse_address("127.0.0.1:9108"), parse_address(":0"), parse_address("[::1]:9108")
    (('127.0.0.1', 9108), ('127.0.0.1', 0), ('::1', 9108))
    >>> parse_address("localhost")
    Traceback (most recent call last):
    ...
    ValueError: expected HOST:PORT such as 127.0.0.1:9108 (port 0: any free port), got 'localhost'
    """
    host, sep, port = address.strip().rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535 or (":" in host and not host.startswith("[")):
        raise ValueError(f"expected HOST:PORT such as 127.0.0.1:9108 (port 0: any free port), got {address!r}")
    host = host.strip("[]")
    return host or "127.0.0.1", int(port)


async def serve_http(address: str, routes: Mapping[str, Route], *, read_timeout: float = READ_TIMEOUT,
                     write_timeout: float = WRITE_TIMEOUT, max_connections: int = MAX_CONNECTIONS) -> HttpEndpoint:
    """Listen on ``HOST:PORT`` (:func:`parse_address`) and answer GET and HEAD requests from ``routes``."""
    host, port = parse_address(address)
    ratelog = RateLimitedLog(log)
    active = 0
    endpoint: HttpEndpoint | None = None

    def refuse(reason: str, peer: str) -> None:
        if endpoint is not None:
            endpoint.refused[reason] = endpoint.refused.get(reason, 0) + 1
        ratelog(reason, f"http: refused a request from {peer}: {reason}")

    async def handle(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        nonlocal active
        peer = _peer(writer)
        if active >= max_connections:
            refuse("too many connections", peer)
            writer.transport.abort()
            return
        active += 1
        try:
            try:
                method, path = await asyncio.wait_for(_read_head(reader), timeout=read_timeout)
            except TimeoutError:
                raise _Refuse(408, "request head not complete in time") from None
            route = routes.get(path)
            if route is None:
                code, body, ctype = 404, b"not found\n", "text/plain; charset=utf-8"
            else:
                try:
                    code, body, ctype = route()
                except Exception as exc:  # a route that fails answers 500; the next request is served again
                    ratelog(f"route {path} failed", f"http: {path} failed: {type(exc).__name__}: {exc}")
                    code, body, ctype = 500, b"internal error\n", "text/plain; charset=utf-8"
            await _answer(writer, code, body, ctype, head_only=method == "HEAD", timeout=write_timeout)
        except _Refuse as r:
            refuse(r.reason, peer)
            with contextlib.suppress(Exception):
                extra = "Allow: GET, HEAD\r\n" if r.code == 405 else ""
                await _answer(writer, r.code, f"{r.reason}\n".encode(), "text/plain; charset=utf-8",
                              timeout=write_timeout, extra=extra)
                await _linger(reader, writer)
        except (ConnectionError, TimeoutError, asyncio.IncompleteReadError):
            pass  # the client went away, or did not take the answer: nothing to tell it
        except Exception as exc:  # never a traceback per request: one line per kind, rate-limited
            ratelog(f"unexpected {type(exc).__name__}", f"http: request from {peer} failed: {type(exc).__name__}: "
                                                         f"{exc}")
        finally:
            active -= 1
            writer.close()
            with contextlib.suppress(Exception):
                await asyncio.wait_for(writer.wait_closed(), timeout=1.0)

    server = await asyncio.start_server(handle, host, port, limit=MAX_LINE)
    endpoint = HttpEndpoint(server, host, int(server.sockets[0].getsockname()[1]))
    return endpoint


async def _read_line(reader: asyncio.StreamReader, too_long: _Refuse) -> bytes:
    try:
        return await reader.readuntil(b"\n")
    except asyncio.LimitOverrunError:
        raise too_long from None
    except asyncio.IncompleteReadError as exc:
        if exc.partial:
            raise _Refuse(400, "request head cut short") from None
        raise


async def _read_head(reader: asyncio.StreamReader) -> tuple[str, str]:
    """Read and check the request line and the header lines; returns (method, path)."""
    line = b""
    for _ in range(4):  # RFC 9112 section 2.2: empty lines before the request line are ignored
        line = (await _read_line(reader, _Refuse(414, "request line too long"))).rstrip(b"\r\n")
        if line:
            break
    parts = line.split(b" ")
    if len(parts) != 3 or not all(parts):
        raise _Refuse(400, "malformed request line")
    method, target, version = parts
    if not _TOKEN.match(method):
        raise _Refuse(400, "malformed request line")
    m = _VERSION.match(version)
    if m is None:
        raise _Refuse(400, "malformed request line")
    if m.group(1) != b"1":
        raise _Refuse(505, "HTTP version not supported")
    head = len(line)
    content = False
    for n in range(MAX_HEADERS + 1):
        h = await _read_line(reader, _Refuse(431, "header line too long"))
        head += len(h)
        if h in (b"\r\n", b"\n"):
            break
        if n == MAX_HEADERS or head > MAX_HEAD:
            raise _Refuse(431, "too many header lines")
        name, colon, value = h.partition(b":")
        if not colon or not _TOKEN.match(name):  # also refuses obsolete line folding (RFC 9112 section 5.2)
            raise _Refuse(400, "malformed header line")
        key, value = name.lower(), value.strip()
        if key == b"transfer-encoding":
            content = True
        elif key == b"content-length":
            if not value.isdigit():
                raise _Refuse(400, "malformed Content-Length")
            content = content or int(value) > 0
    if method not in (b"GET", b"HEAD"):
        raise _Refuse(405, "method not allowed (GET and HEAD only)")
    if content:
        raise _Refuse(413, "request with content (GET and HEAD take none)")
    text = target.decode("latin-1")
    if text.startswith(("http://", "https://")):  # absolute form (RFC 9112 section 3.2.2)
        text = "/" + text.split("://", 1)[1].partition("/")[2]
    if not text.startswith("/"):
        raise _Refuse(400, "malformed request target")
    return method.decode("ascii"), text.split("?", 1)[0].split("#", 1)[0]


async def _answer(writer: asyncio.StreamWriter, code: int, body: bytes, ctype: str, *, timeout: float,
                  head_only: bool = False, extra: str = "") -> None:
    head = (f"HTTP/1.1 {code} {_REASONS.get(code, 'Unknown')}\r\nContent-Type: {ctype}\r\n"
            f"Content-Length: {len(body)}\r\nCache-Control: no-store\r\nX-Content-Type-Options: nosniff\r\n"
            f"{extra}Connection: close\r\n\r\n")
    writer.write(head.encode("latin-1") + (b"" if head_only else body))
    await asyncio.wait_for(writer.drain(), timeout=timeout)


async def _linger(reader: asyncio.StreamReader, writer: asyncio.StreamWriter, seconds: float = 1.0) -> None:
    """After an error answer, stop writing and discard what the client still sends for a moment, so closing
    does not reset the connection before the client has read the answer."""
    if writer.can_write_eof():
        writer.write_eof()
    end = asyncio.get_running_loop().time() + seconds
    with contextlib.suppress(Exception):
        while (left := end - asyncio.get_running_loop().time()) > 0:
            if not await asyncio.wait_for(reader.read(65536), timeout=left):
                break


def _peer(writer: asyncio.StreamWriter) -> str:
    info = writer.get_extra_info("peername")
    if isinstance(info, tuple) and len(info) >= 2:
        return f"{info[0]}:{info[1]}"
    return "?"
