"""A small read-only HTTP endpoint on asyncio: GET a path, get (status code, body, content type).

The daemon serves ``/healthz`` and ``/metrics`` with it. Each route is a function without
arguments; the query string is ignored. A request line or header that does not arrive within
a few seconds, or is malformed, closes the connection.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Mapping
from dataclasses import dataclass

Route = Callable[[], tuple[int, bytes, str]]
READ_TIMEOUT = 5.0
_REASONS = {200: "OK", 404: "Not Found", 503: "Service Unavailable"}


@dataclass
class HttpEndpoint:
    server: asyncio.Server
    host: str
    port: int

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    async def close(self) -> None:
        self.server.close()
        await self.server.wait_closed()


async def serve_http(address: str, routes: Mapping[str, Route]) -> HttpEndpoint:
    """Listen on ``HOST:PORT`` (port 0: any free one) and answer GET requests from ``routes``."""
    host, _, port = address.rpartition(":")
    host = host or "127.0.0.1"

    async def handle(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            request = await asyncio.wait_for(reader.readline(), timeout=READ_TIMEOUT)
            while (await asyncio.wait_for(reader.readline(), timeout=READ_TIMEOUT)) not in (b"\r\n", b"\n", b""):
                pass
            parts = request.decode("latin-1").split()
            path = (parts[1] if len(parts) >= 2 else "/").split("?", 1)[0]
            route = routes.get(path)
            code, body, ctype = route() if route is not None else (404, b"not found\n", "text/plain")
            writer.write(f"HTTP/1.1 {code} {_REASONS.get(code, '')}\r\nContent-Type: {ctype}\r\n"
                         f"Content-Length: {len(body)}\r\nConnection: close\r\n\r\n".encode() + body)
            await writer.drain()
        except (TimeoutError, ConnectionError, UnicodeDecodeError):
            pass
        finally:
            writer.close()

    server = await asyncio.start_server(handle, host, int(port))
    return HttpEndpoint(server, host, int(server.sockets[0].getsockname()[1]))
