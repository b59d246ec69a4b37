"""A tiny read-only HTTP/1.1 server for the station view (stdlib asyncio, no framework).

Theory of operation
-------------------
Four resources, all read-only (RFC 9110 §9.2.1 safe methods only: GET and HEAD; anything else
is ``405`` with an ``Allow`` header, §15.5.6):

==================  ===========================================================
``/``               the page (``assets/index.html``)
``/assets/NAME``    a static asset shipped in the package (a fixed table)
``/snapshot.json``  the hub's current snapshot
``/events``         server-sent events (WHATWG HTML, "Server-sent events"):
                    a ``snapshot`` first, then ``delta`` messages as they happen
==================  ===========================================================

Everything else is ``404``. Assets are read once at start into a table keyed by name, so no
request path ever reaches the file system: there is nothing to traverse. One request per
connection (``Connection: close``); the head is bounded (``MAX_HEAD_BYTES``, else ``431``,
RFC 6585 §5) and must arrive within ``HEAD_TIMEOUT_S``. Event streams are capped
(``MAX_STREAMS``, else ``503``) because each holds a socket and a queue on a small board.

Bound to 127.0.0.1 by default. On a loopback bind, a request whose ``Host`` is not a loopback
name is refused (``403``): a web page elsewhere cannot read the station through DNS
rebinding. On another bind (a line lead's desktop reaching the board) any host is accepted;
the page is read-only but has no log-in, so bind it only to a network that may see it.

Responses carry ``Content-Security-Policy`` allowing only this origin, ``nosniff`` and
``no-referrer``: the page loads nothing from elsewhere and needs nothing from elsewhere.
"""

from __future__ import annotations

import asyncio
import contextlib
import ipaddress
import logging
from collections.abc import Mapping
from importlib import resources
from typing import Final

from clampd.daemon.view._hub import Message, ViewHub

__all__ = [
    "HEAD_TIMEOUT_S",
    "HEARTBEAT_S",
    "MAX_HEAD_BYTES",
    "MAX_STREAMS",
    "ViewServer",
    "ViewServerError",
    "load_assets",
]

_log = logging.getLogger(__name__)

# A browser's request head is well under 2 KiB; 8 KiB is the common default limit of web
# servers (common practice, no source) and bounds what a stray client can make us buffer.
MAX_HEAD_BYTES: Final = 8192
# A head that takes longer than this is a stuck or hostile client (our choice).
HEAD_TIMEOUT_S: Final = 10.0
# A comment line on an idle event stream this often: a dead page is noticed (the write
# fails) and intermediaries keep the stream open (our choice; 15 s is common for SSE).
HEARTBEAT_S: Final = 15.0
# Open event streams at most: a touchscreen, a few desktops and some slack (our choice).
MAX_STREAMS: Final = 16
# The browser waits this long before reconnecting a dropped stream (SSE ``retry:`` field).
_RETRY_MS: Final = 1000

_TYPES: Final = {
    ".html": "text/html; charset=utf-8",
    ".js": "text/javascript; charset=utf-8",
    ".css": "text/css; charset=utf-8",
    ".svg": "image/svg+xml",
    ".json": "application/json",
}
_CSP: Final = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)
_REASONS: Final = {
    200: "OK",
    400: "Bad Request",
    403: "Forbidden",
    404: "Not Found",
    405: "Method Not Allowed",
    431: "Request Header Fields Too Large",
    503: "Service Unavailable",
    505: "HTTP Version Not Supported",
}
_LOOPBACK_NAMES: Final = frozenset({"localhost", "localhost.", "ip6-localhost"})


class ViewServerError(RuntimeError):
    """The view could not start (assets missing from the package, address in use, ...)."""


def load_assets() -> dict[str, tuple[bytes, str]]:
    """The shipped assets by name → (bytes, content type); read once, at start."""
    out: dict[str, tuple[bytes, str]] = {}
    try:
        folder = resources.files("clampd.daemon.view").joinpath("assets")
        for item in folder.iterdir():
            name = item.name
            suffix = name[name.rfind(".") :] if "." in name else ""
            if item.is_file() and suffix in _TYPES:
                out[name] = (item.read_bytes(), _TYPES[suffix])
    except OSError as exc:
        raise ViewServerError(f"view assets unreadable: {exc}") from exc
    if "index.html" not in out:
        raise ViewServerError("view assets: index.html is missing from the package")
    return out


def _is_loopback_host(host_header: str) -> bool:
    host = host_header.strip().lower()
    if host.startswith("["):  # [::1]:port
        host = host[1 : host.find("]")] if "]" in host else ""
    elif host.count(":") == 1:
        host = host.split(":", 1)[0]
    if host in _LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class _BadRequestError(Exception):
    def __init__(self, status: int, text: str) -> None:
        super().__init__(text)
        self.status = status


class ViewServer:
    """Serve ``hub`` on ``host:port`` (port 0 picks a free one); ``async with`` or
    ``start()``/``close()``. ``url`` is the page's address once started."""

    def __init__(
        self,
        hub: ViewHub,
        *,
        host: str = "127.0.0.1",
        port: int = 0,
        assets: Mapping[str, tuple[bytes, str]] | None = None,
        heartbeat_s: float = HEARTBEAT_S,
        max_streams: int = MAX_STREAMS,
    ) -> None:
        if not 0 <= port <= 65535:
            raise ViewServerError(f"port must be 0..65535, got {port}")
        self.hub = hub
        self.host = host
        self._port = port
        self._assets: dict[str, tuple[bytes, str]] | None = (
            dict(assets) if assets is not None else None
        )
        self._heartbeat_s = heartbeat_s
        self._max_streams = max_streams
        self._server: asyncio.Server | None = None
        self._loopback_only = _is_loopback_host(host)
        self._streams: set[asyncio.Task[None]] = set()
        self._closing = False
        self.bytes_sent = 0
        """Bytes of response heads and bodies written, event streams included."""
        self.served: dict[str, int] = {}
        """Bytes written per path; for ``/events`` only each stream's head and first message
        (the snapshot a page loads with). The page-weight measurement sums these."""

    @property
    def port(self) -> int:
        """The bound port (after start)."""
        if self._server is None:
            return self._port
        return int(self._server.sockets[0].getsockname()[1])

    @property
    def url(self) -> str:
        """The page's address, e.g. ``http://127.0.0.1:8740/``."""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/"

    @property
    def streams(self) -> int:
        """Event streams open now."""
        return len(self._streams)

    async def start(self) -> None:
        """Read the assets (in a thread: file reads stall the loop on a slow SD card), bind
        and listen. Raises ``ViewServerError`` when assets or the address are unavailable."""
        self._closing = False
        if self._assets is None:
            self._assets = await asyncio.to_thread(load_assets)
        try:
            self._server = await asyncio.start_server(
                self._client, self.host, self._port, limit=MAX_HEAD_BYTES
            )
        except OSError as exc:
            raise ViewServerError(
                f"view: cannot listen on {self.host}:{self._port}: {exc}"
            ) from exc
        _log.info("station view at %s", self.url)

    async def close(self) -> None:
        """Stop listening and end every open stream."""
        self._closing = True
        server, self._server = self._server, None
        if server is not None:
            server.close()
        for task in list(self._streams):
            task.cancel()
        if server is not None:
            await server.wait_closed()

    async def __aenter__(self) -> ViewServer:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    async def serve_forever(self) -> None:
        """Start (if needed) and serve until cancelled: the supervisor's task body."""
        if self._server is None:
            await self.start()
        try:
            await asyncio.Event().wait()
        finally:
            await self.close()

    # -- one connection ---------------------------------------------------------------------

    async def _client(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            try:
                method, path, headers = await asyncio.wait_for(
                    self._read_head(reader), HEAD_TIMEOUT_S
                )
            except _BadRequestError as exc:
                await self._respond(writer, exc.status, str(exc).encode() + b"\n", "text/plain")
                return
            except (TimeoutError, asyncio.IncompleteReadError, ConnectionError):
                return
            before = self.bytes_sent
            try:
                await self._route(writer, method, path, headers)
            finally:
                if path != "/events":
                    self.served[path] = self.served.get(path, 0) + self.bytes_sent - before
        except ConnectionError:
            pass  # the page went away mid-response
        except asyncio.CancelledError:
            # close() ended this stream. The connection's task is asyncio's, whose done
            # callback (3.11) reads task.exception() and would log a cancelled task as an
            # error: end it normally instead. Any other cancellation propagates.
            task = asyncio.current_task()
            if not self._closing or task is None:
                raise
            task.uncancel()
        finally:
            writer.close()
            with contextlib.suppress(ConnectionError, asyncio.CancelledError):
                await writer.wait_closed()

    async def _read_head(self, reader: asyncio.StreamReader) -> tuple[str, str, dict[str, str]]:
        try:
            head = await reader.readuntil(b"\r\n\r\n")
        except asyncio.LimitOverrunError:
            raise _BadRequestError(431, "request head too large") from None
        try:
            text = head.decode("latin-1")
        except UnicodeDecodeError:  # latin-1 decodes any byte; kept total
            raise _BadRequestError(400, "undecodable request head") from None
        lines = text.split("\r\n")
        parts = lines[0].split(" ")
        if len(parts) != 3 or not parts[1].startswith("/"):
            raise _BadRequestError(400, "malformed request line")
        method, target, version = parts
        if version not in ("HTTP/1.1", "HTTP/1.0"):
            raise _BadRequestError(505, "only HTTP/1.x is spoken here")
        headers: dict[str, str] = {}
        for line in lines[1:]:
            if not line:
                continue
            name, sep, value = line.partition(":")
            if not sep or not name or name != name.strip():
                raise _BadRequestError(400, "malformed header line")
            headers[name.lower()] = value.strip()
        if version == "HTTP/1.1" and "host" not in headers:
            raise _BadRequestError(400, "HTTP/1.1 request without Host")  # RFC 9112 §3.2
        return method, target.split("?", 1)[0].split("#", 1)[0], headers

    async def _route(
        self, writer: asyncio.StreamWriter, method: str, path: str, headers: Mapping[str, str]
    ) -> None:
        if self._loopback_only and not _is_loopback_host(headers.get("host", "localhost")):
            await self._respond(writer, 403, b"host not allowed\n", "text/plain")
            return
        if method not in ("GET", "HEAD"):
            await self._respond(
                writer, 405, b"read-only\n", "text/plain", extra={"Allow": "GET, HEAD"}
            )
            return
        head_only = method == "HEAD"
        if path == "/events":
            await self._events(writer, head_only)
            return
        if path == "/snapshot.json":
            body = self.hub.snapshot_message().data.encode()
            await self._respond(writer, 200, body, "application/json", head_only=head_only)
            return
        name = "index.html" if path == "/" else path.removeprefix("/assets/")
        assets = self._assets or {}
        asset = assets.get(name) if (path == "/" or path.startswith("/assets/")) else None
        if asset is None or "/" in name:
            await self._respond(writer, 404, b"not found\n", "text/plain", head_only=head_only)
            return
        body, ctype = asset
        await self._respond(
            writer,
            200,
            body,
            ctype,
            head_only=head_only,
            cache="no-cache",  # revalidate: a new release must show at once
        )

    def _head(
        self, status: int, ctype: str, length: int | None, extra: Mapping[str, str], cache: str
    ) -> bytes:
        lines = [
            f"HTTP/1.1 {status} {_REASONS[status]}",
            f"Content-Type: {ctype}",
            f"Cache-Control: {cache}",
            f"Content-Security-Policy: {_CSP}",
            "X-Content-Type-Options: nosniff",
            "Referrer-Policy: no-referrer",
            "Connection: close",
        ]
        if length is not None:
            lines.append(f"Content-Length: {length}")
        lines += [f"{k}: {v}" for k, v in extra.items()]
        return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1")

    async def _respond(
        self,
        writer: asyncio.StreamWriter,
        status: int,
        body: bytes,
        ctype: str,
        *,
        head_only: bool = False,
        extra: Mapping[str, str] | None = None,
        cache: str = "no-store",
    ) -> None:
        data = self._head(status, ctype, len(body), extra or {}, cache)
        if not head_only:
            data += body
        writer.write(data)
        self.bytes_sent += len(data)
        await writer.drain()

    async def _events(self, writer: asyncio.StreamWriter, head_only: bool) -> None:
        if len(self._streams) >= self._max_streams:
            await self._respond(
                writer, 503, b"too many views open\n", "text/plain", extra={"Retry-After": "5"}
            )
            return
        head = self._head(200, "text/event-stream", None, {}, "no-store")
        writer.write(head)
        self.bytes_sent += len(head)
        if head_only:
            await writer.drain()
            return
        task = asyncio.current_task()
        assert task is not None
        self._streams.add(task)
        first = True
        try:
            with self.hub.subscribe() as sub:
                writer.write(f"retry: {_RETRY_MS}\n\n".encode())
                while True:
                    try:
                        message = await asyncio.wait_for(sub.next(), self._heartbeat_s)
                    except TimeoutError:
                        writer.write(b": still here\n\n")
                    else:
                        chunk = _sse(message)
                        # Whatever else is ready goes out in the same write.
                        while (more := sub.next_nowait()) is not None:
                            chunk += _sse(more)
                        self.bytes_sent += len(chunk)
                        if first:
                            first = False
                            self.served["/events"] = (
                                self.served.get("/events", 0) + len(head) + len(chunk)
                            )
                        writer.write(chunk)
                    await writer.drain()
        finally:
            self._streams.discard(task)


def _sse(message: Message) -> bytes:
    # JSON never contains a raw newline, so the payload is one data line.
    return f"id: {message.seq}\nevent: {message.event}\ndata: {message.data}\n\n".encode()
