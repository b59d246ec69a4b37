"""The station view's HTTP/1.1 server over real sockets on 127.0.0.1.

References: RFC 9110 (HTTP semantics: safe methods §9.2.1, 405 with ``Allow`` §15.5.6, HEAD
§9.3.2), RFC 9112 (HTTP/1.1: ``Host`` required, §3.2), RFC 6585 §5 (431), and the WHATWG HTML
Living Standard, "Server-sent events", §9.2.6 "Interpreting an event stream" — the parser
below follows that section's field rules, written from the text, not from the server.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import queue
import socket
import threading
from collections.abc import AsyncIterator, Iterator
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from view_support import POSITIONS, STATION, WRENCH, get, raw, show_station

from clampd.daemon.view import MAX_HEAD_BYTES, ViewHub, ViewServer, ViewServerError, load_assets


class SseReader:
    """Event stream interpretation after WHATWG HTML §9.2.6 (fields, blank-line dispatch)."""

    def __init__(self, reader: asyncio.StreamReader) -> None:
        self.reader = reader
        self.data: list[str] = []
        self.event = ""
        self.last_id = ""
        self.retry: int | None = None

    async def next_event(self) -> tuple[str, str, str]:
        while True:
            raw_line = await asyncio.wait_for(self.reader.readline(), 10)
            if not raw_line:
                raise EOFError
            line = raw_line.decode("utf-8").rstrip("\r\n")
            if line == "":
                if not self.data:  # "If the data buffer is an empty string ... return"
                    self.event = ""
                    continue
                out = (self.event or "message", "\n".join(self.data), self.last_id)
                self.data, self.event = [], ""
                return out
            if line.startswith(":"):
                continue  # a comment
            field, colon, value = line.partition(":")
            if colon and value.startswith(" "):
                value = value[1:]
            if field == "event":
                self.event = value
            elif field == "data":
                self.data.append(value)
            elif field == "id" and "\0" not in value:
                self.last_id = value
            elif field == "retry" and value.isdigit():
                self.retry = int(value)


@contextlib.asynccontextmanager
async def stream(port: int) -> AsyncIterator[tuple[dict[str, str], SseReader]]:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.write(f"GET /events HTTP/1.1\r\nHost: localhost:{port}\r\n\r\n".encode())
    await writer.drain()
    head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), 10)
    lines = head.decode("latin-1").split("\r\n")
    headers = {"status": lines[0]}
    for line in lines[1:]:
        k, _, v = line.partition(":")
        if k:
            headers[k.strip().lower()] = v.strip()
    try:
        yield headers, SseReader(reader)
    finally:
        writer.close()
        with contextlib.suppress(ConnectionError):
            await writer.wait_closed()


@pytest.fixture
async def served() -> AsyncIterator[tuple[ViewHub, ViewServer]]:
    hub = ViewHub(STATION, name="bench")
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    async with ViewServer(hub) as server:
        yield hub, server


def test_the_package_ships_the_page_and_its_assets() -> None:
    assets = load_assets()
    assert {"index.html", "app.js", "app.css"} <= set(assets)
    html = assets["index.html"][0].decode()
    # Nothing is loaded from elsewhere: every src/href is this origin's or a data: URL.
    for attr in ("src=", "href="):
        for part in html.split(attr)[1:]:
            url = part[1 : part.index(part[0], 1)]
            assert url.startswith(("/assets/", "#", "data:")), url
    assert "http://" not in assets["app.js"][0].decode().replace("http://www.w3.org/2000/svg", "")


async def test_page_assets_and_snapshot_are_served(served: tuple[ViewHub, ViewServer]) -> None:
    hub, server = served
    status, headers, body = await get(server.port, "/")
    assert status == 200
    assert headers["content-type"].startswith("text/html")
    assert "default-src 'none'" in headers["content-security-policy"]
    assert headers["x-content-type-options"] == "nosniff"
    assert int(headers["content-length"]) == len(body)
    assert b'<script src="/assets/app.js"' in body
    for name, ctype in (("app.js", "text/javascript"), ("app.css", "text/css")):
        status, headers, body = await get(server.port, f"/assets/{name}")
        assert status == 200
        assert headers["content-type"].startswith(ctype)
        assert body == load_assets()[name][0]
    status, headers, body = await get(server.port, "/snapshot.json")
    assert status == 200
    assert headers["cache-control"] == "no-store"
    snap = json.loads(body)
    assert snap["station"]["id"] == STATION
    assert [j["position"] for j in snap["jobs"][0]["joints"]] == list(POSITIONS)
    assert snap["seq"] == hub.snapshot()["seq"]


async def test_head_gives_the_headers_of_get_without_a_body(
    served: tuple[ViewHub, ViewServer],
) -> None:
    _, server = served
    g_status, g_headers, g_body = await get(server.port, "/")
    h_status, h_headers, h_body = await get(server.port, "/", method="HEAD")
    assert (h_status, h_body) == (g_status, b"")  # RFC 9110 §9.3.2
    assert h_headers["content-length"] == g_headers["content-length"] == str(len(g_body))


async def test_events_stream_a_snapshot_then_ordered_deltas(
    served: tuple[ViewHub, ViewServer],
) -> None:
    hub, server = served
    async with stream(server.port) as (headers, sse):
        assert headers["status"] == "HTTP/1.1 200 OK"
        assert headers["content-type"] == "text/event-stream"
        assert headers["cache-control"] == "no-store"
        event, data, first_id = await sse.next_event()
        assert sse.retry == 1000
        assert event == "snapshot"
        snap = json.loads(data)
        assert snap["station"]["id"] == STATION
        assert int(first_id) == snap["seq"]
        assert server.streams == 1
        hub.on_link(WRENCH, connected=True, battery_pct=55)
        hub.on_broker(True, 2)
        ids = []
        for expected in ("wrench", "broker"):
            event, data, last_id = await sse.next_event()
            body = json.loads(data)
            assert (event, body["type"]) == ("delta", expected)
            assert int(last_id) == body["seq"]
            ids.append(body["seq"])
        assert ids == [snap["seq"] + 1, snap["seq"] + 2]
    for _ in range(100):  # the server notices the closed page at its next write
        if server.streams == 0:
            break
        hub.on_broker(False, len(ids))
        ids.append(0)
        await asyncio.sleep(0.01)
    assert server.streams == 0
    assert hub.subscribers == 0


@pytest.mark.parametrize(
    "path",
    [
        "/nope",
        "/index.html",
        "/assets/",
        "/assets/nope.js",
        "/assets/../_hub.py",
        "/assets/%2e%2e/_hub.py",
        "/assets/..%2f_server.py",
        "/assets/../../../../etc/passwd",
        "/assets//etc/passwd",
        "/../daemon/view/_hub.py",
        "/assets/../__init__.py",
        "/assets/./app.js",
    ],
)
async def test_anything_else_is_404_and_nothing_outside_the_table_is_read(
    served: tuple[ViewHub, ViewServer], path: str
) -> None:
    _, server = served
    status, _, body = await get(server.port, path)
    assert status == 404
    assert b"import" not in body
    assert b"root:" not in body


@pytest.mark.parametrize("method", ["POST", "PUT", "DELETE", "PATCH", "OPTIONS", "CONNECT"])
async def test_the_view_is_read_only(served: tuple[ViewHub, ViewServer], method: str) -> None:
    hub, server = served
    before = hub.snapshot()
    for path in ("/", "/events", "/snapshot.json"):
        status, headers, _ = await raw(
            server.port,
            f"{method} {path} HTTP/1.1\r\nHost: localhost\r\n"
            "Content-Length: 2\r\n\r\n{}".encode(),
        )
        assert status == 405
        assert headers["allow"] == "GET, HEAD"  # RFC 9110 §15.5.6: a 405 must list them
    assert hub.snapshot() == before


async def test_malformed_and_oversized_requests(served: tuple[ViewHub, ViewServer]) -> None:
    _, server = served
    port = server.port
    assert (await raw(port, b"GET / HTTP/1.1\r\n\r\n"))[0] == 400  # RFC 9112 §3.2: Host
    assert (await raw(port, b"GET /\r\nHost: x\r\n\r\n"))[0] == 400
    assert (await raw(port, b"GET / HTTP/2.0\r\nHost: localhost\r\n\r\n"))[0] == 505
    assert (await raw(port, b"GET / HTTP/1.1\r\nHost: localhost\r\nbroken\r\n\r\n"))[0] == 400
    big = b"GET / HTTP/1.1\r\nHost: localhost\r\nX-Pad: " + b"a" * MAX_HEAD_BYTES + b"\r\n\r\n"
    assert (await raw(port, big))[0] == 431  # RFC 6585 §5
    # HTTP/1.0 needs no Host.
    assert (await raw(port, b"GET /snapshot.json HTTP/1.0\r\n\r\n"))[0] == 200


@pytest.mark.parametrize(
    ("host", "status"),
    [
        ("localhost", 200),
        ("127.0.0.1:8740", 200),
        ("[::1]:8740", 200),
        ("127.1.2.3", 200),
        ("station.example", 403),
        ("192.0.2.7:8740", 403),
        ("localhost.evil.example", 403),
    ],
)
async def test_a_loopback_bind_refuses_foreign_host_names(
    served: tuple[ViewHub, ViewServer], host: str, status: int
) -> None:
    _, server = served
    assert (await get(server.port, "/snapshot.json", host=host))[0] == status


async def test_a_slow_page_is_skipped_ahead_and_never_holds_up_the_hub() -> None:
    hub = ViewHub(STATION, queue_bound=4, curve_interval_s=0.0)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    async with ViewServer(hub) as server, stream(server.port) as (_, sse):
        assert (await sse.next_event())[0] == "snapshot"
        hub.on_link(WRENCH, connected=True)
        pad = "x" * 20_000
        # Large deltas while the page reads nothing: the socket buffers fill, the server's
        # writer waits in drain(), and the page's queue overflows. Every hub call returns.
        for k in range(400):
            hub.on_station(_named(hub, f"{pad}{k}"))
            if k % 20 == 0:
                await asyncio.sleep(0)  # let the server run into the full socket
        (sub,) = hub._subs
        assert sub.dropped >= 1
        hub.on_broker(True, 99)
        snapshots = 0
        last: dict[str, Any] | None = None
        while True:
            event, data, _ = await sse.next_event()
            body = json.loads(data)
            snapshots += event == "snapshot"
            if event == "delta" and body["type"] == "broker":
                last = body
                break
            if event == "snapshot" and body["broker"]["backlog"] == 99:
                last = body
                break
        assert snapshots >= 1  # skipped ahead with a fresh snapshot
        assert last is not None


async def _drain(sse: SseReader) -> None:
    while True:
        await sse.next_event()


def _named(hub: ViewHub, name: str) -> Any:
    from clampd.daemon.view import StationView

    return StationView(station_id=STATION, name=name)


async def test_open_streams_are_capped() -> None:
    hub = ViewHub(STATION)
    async with (
        ViewServer(hub, max_streams=2) as server,
        stream(server.port) as (h1, s1),
        stream(server.port) as (h2, s2),
    ):
        await s1.next_event()
        await s2.next_event()
        status, headers, _ = await get(server.port, "/events")
        assert status == 503
        assert headers["retry-after"] == "5"
        assert h1["status"].endswith("200 OK")
        assert h2["status"].endswith("200 OK")


async def test_closing_the_server_ends_open_streams() -> None:
    hub = ViewHub(STATION)
    server = ViewServer(hub)
    await server.start()
    async with stream(server.port) as (_, sse):
        await sse.next_event()
        await server.close()
        with pytest.raises(EOFError):
            await _drain(sse)
    assert server.streams == 0


async def test_an_address_in_use_or_a_bad_port_is_a_clear_error() -> None:
    hub = ViewHub(STATION)
    with pytest.raises(ViewServerError, match="port must be"):
        ViewServer(hub, port=70000)
    async with ViewServer(hub) as first:
        taken = ViewServer(hub, port=first.port)
        with pytest.raises(ViewServerError, match="cannot listen"):
            await taken.start()
    assert first.url.startswith("http://127.0.0.1:")


async def test_serving_makes_no_blocking_call_in_the_loop(blockbuster: object) -> None:
    hub = ViewHub(STATION)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    async with ViewServer(hub) as server:
        assert (await get(server.port, "/"))[0] == 200
        assert (await get(server.port, "/snapshot.json"))[0] == 200
        async with stream(server.port) as (_, sse):
            assert (await sse.next_event())[0] == "snapshot"
            hub.on_broker(True, 1)
            assert (await sse.next_event())[0] == "delta"


# -- arbitrary requests -------------------------------------------------------------------------

_ALLOWED = {200, 400, 403, 404, 405, 431, 505}


@pytest.fixture(scope="module")
def threaded_server() -> Iterator[int]:
    """The real server on its own loop in a thread, so hypothesis can drive it synchronously."""
    ready: queue.Queue[int] = queue.Queue()
    loop = asyncio.new_event_loop()

    async def main(stop: asyncio.Event) -> None:
        hub = ViewHub(STATION)
        show_station(hub, dict.fromkeys(POSITIONS, "pending"))
        async with ViewServer(hub) as server:
            ready.put(server.port)
            await stop.wait()

    stop = asyncio.Event()
    thread = threading.Thread(target=loop.run_until_complete, args=(main(stop),), daemon=True)
    thread.start()
    port = ready.get(timeout=10)
    try:
        yield port
    finally:
        loop.call_soon_threadsafe(stop.set)
        thread.join(10)
        loop.close()


def _send(port: int, data: bytes) -> bytes:
    with socket.create_connection(("127.0.0.1", port), timeout=5) as s:
        with contextlib.suppress(ConnectionError):
            s.sendall(data)
            s.shutdown(socket.SHUT_WR)  # no more bytes: a partial head ends here
        chunks = []
        with contextlib.suppress(ConnectionError):
            while chunk := s.recv(65536):
                chunks.append(chunk)
        return b"".join(chunks)


# (``/events`` is left out: a valid request for it opens a stream that never ends by design.)
_line_parts = st.text(
    alphabet=st.characters(min_codepoint=0, max_codepoint=255), min_size=0, max_size=40
)
_requests = st.one_of(
    st.binary(max_size=3000),
    st.builds(
        lambda method, path, version, headers: (
            f"{method} {path} {version}\r\n{headers}\r\n\r\n".encode("latin-1")
        ),
        st.sampled_from(["GET", "HEAD", "POST", "get", "", "GET GET", "\x00"]),
        st.one_of(st.sampled_from(["/", "/snapshot.json", "/assets/app.js", "/x"]), _line_parts),
        st.sampled_from(["HTTP/1.1", "HTTP/1.0", "HTTP/2", "", "http/1.1"]),
        _line_parts,
    ),
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=_requests)
def test_any_request_bytes_get_a_status_or_a_close_and_the_server_goes_on(
    threaded_server: int, data: bytes
) -> None:
    reply = _send(threaded_server, data)
    if reply:
        head = reply.split(b"\r\n", 1)[0].decode("latin-1")
        assert head.startswith("HTTP/1.1 "), head
        status = int(head.split(" ")[1])
        assert status in _ALLOWED
        if status == 200:
            assert b"\r\n\r\n" in reply
    # The next ordinary request is served as if nothing happened.
    ok = _send(threaded_server, b"GET /snapshot.json HTTP/1.1\r\nHost: localhost\r\n\r\n")
    assert ok.startswith(b"HTTP/1.1 200 OK")
