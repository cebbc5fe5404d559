"""Slow and surplus connections against a real 2-worker server: closed, capped, and served."""

from __future__ import annotations

import contextlib
import socket
import time
from pathlib import Path

import httpx
import pytest

from tests.api.svc_helpers import HOST, Server, serve

pytestmark = [pytest.mark.slow, pytest.mark.server]

WAIT = 90.0  # generous bound on every wait below; the tests never measure how long things take
STALLED = 50
TRICKLING = 5


def _port(server: Server) -> int:
    return int(server.url.rsplit(":", 1)[1])


def _connect(server: Server, first_bytes: bytes) -> socket.socket:
    s = socket.create_connection((HOST, _port(server)), timeout=WAIT)
    if first_bytes:
        s.sendall(first_bytes)
    return s


def _closed_by_server(s: socket.socket, received: bytearray) -> bool:
    """Whether the server has closed this socket (reading what it sent), without blocking."""
    s.setblocking(False)
    try:
        while True:
            chunk = s.recv(4096)
            if not chunk:
                return True
            received.extend(chunk)
    except BlockingIOError:
        return False
    except (ConnectionResetError, BrokenPipeError):
        return True
    finally:
        s.setblocking(True)


def _read_reply(s: socket.socket) -> bytes:
    """One whole HTTP reply (headers and a Content-Length body): a single recv may return part."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = s.recv(65536)
        if not chunk:
            return data
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    length = 0
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value.strip())
    while len(body) < length:
        chunk = s.recv(65536)
        if not chunk:
            break
        body += chunk
    return head + b"\r\n\r\n" + body


def _info_ok(server: Server) -> bool:
    with httpx.Client(base_url=server.url, timeout=WAIT) as c:
        return c.get("/v1/info").status_code == 200


def test_stalled_and_trickling_requests_are_closed(index_dir: Path, tmp_path: Path) -> None:
    with serve(["--index", str(index_dir), "--request-timeout", "2"], tmp_path, workers=2) as srv:
        stalled = [_connect(srv, b"POST /v1/rank HT") for _ in range(STALLED // 2)]
        stalled += [
            _connect(srv, b"POST /v1/rank HTTP/1.1\r\nHost: x\r\nContent-Length: 40\r\n\r\n{")
            for _ in range(STALLED - len(stalled))
        ]
        # A connection that completed one request, then sends half of the next.
        kept = _connect(srv, b"GET /v1/info HTTP/1.1\r\nHost: x\r\n\r\n")
        first = _read_reply(kept)
        assert first.startswith(b"HTTP/1.1 200"), first[:100]
        kept.sendall(b"GET /v1/in")
        # Clients sending a byte now and then: a timer reset by every byte never fires.
        trickling = [_connect(srv, b"GET /v1/info HTTP/1.1\r\nX-Slow: ") for _ in range(TRICKLING)]
        replies = {id(s): bytearray() for s in [*stalled, kept, *trickling]}

        assert _info_ok(srv)
        open_ = [*stalled, kept, *trickling]
        deadline = time.monotonic() + WAIT
        while open_ and time.monotonic() < deadline:
            for s in trickling:
                if s in open_:
                    with contextlib.suppress(OSError):
                        s.send(b"a")
            open_ = [s for s in open_ if not _closed_by_server(s, replies[id(s)])]
            # Normal requests are served all along.
            assert _info_ok(srv)
            time.sleep(0.25)
        n_open = len(open_)
        for s in [*stalled, kept, *trickling]:
            s.close()
        assert n_open == 0, f"{n_open} slow connections still open after {WAIT:.0f} s"
        # Those that stalled in the request line are told why (the trickling ones may get a
        # reset instead, when a byte crosses the close).
        told = {
            i: bytes(replies[id(s)][:40]) for i, s in enumerate([*stalled[: STALLED // 2], kept])
        }
        untold = {i: r for i, r in told.items() if not r.startswith(b"HTTP/1.1 408")}
        assert not untold, (
            f"{len(untold)} of {len(told)} not told 408 (last is the kept-alive one): {untold}"
        )
        assert _info_ok(srv)


def _open_server_side(sockets: list[socket.socket], replies: dict[int, bytearray]) -> int:
    return sum(not _closed_by_server(s, replies[id(s)]) for s in sockets)


def test_stalled_connections_over_the_cap_make_room(index_dir: Path, tmp_path: Path) -> None:
    cap, workers, waves, per_wave = 5, 2, 3, 30
    args = ["--index", str(index_dir), "--max-connections", str(cap), "--request-timeout", "600"]
    with serve(args, tmp_path, workers=workers) as srv:
        sockets: list[socket.socket] = []
        replies: dict[int, bytearray] = {}
        try:
            for _ in range(waves):
                # Connections that send nothing and would wait for the 600 s deadline.
                # (Nothing sent: a server closing a socket with unread bytes resets it,
                # which could drop its reply before this side reads it.)
                wave = [_connect(srv, b"") for _ in range(per_wave)]
                sockets += wave
                replies.update({id(s): bytearray() for s in wave})
                # Each worker holds at most `cap` of them: the rest are closed, with a 503.
                deadline = time.monotonic() + WAIT
                while (
                    _open_server_side(sockets, replies) > cap * workers
                    and time.monotonic() < deadline
                ):
                    time.sleep(0.1)
                still_open = _open_server_side(sockets, replies)
                assert still_open <= cap * workers, f"{still_open} stalled connections kept"
                # New clients are served although the workers are full of stalled ones:
                # these are not refused, the longest-waiting stalled ones make room.
                for _ in range(2 * workers):
                    assert _info_ok(srv)
            # Every stalled connection closed to make room was told why.
            closed = [s for s in sockets if _closed_by_server(s, replies[id(s)])]
            assert len(closed) >= len(sockets) - cap * workers
            told = [bytes(replies[id(s)][:40]) for s in closed]
            assert all(t.startswith(b"HTTP/1.1 503") for t in told), told[:3]
        finally:
            for s in sockets:
                s.close()


def _data_segments_in(s: socket.socket) -> int:
    """TCP segments with data this socket has received (Linux struct tcp_info's
    tcpi_data_segs_in, at byte 152 since Linux 4.6; include/uapi/linux/tcp.h)."""
    info = s.getsockopt(socket.IPPROTO_TCP, socket.TCP_INFO, 256)
    return int.from_bytes(info[152:156], "little")


def test_a_reply_head_and_body_arrive_in_one_segment(index_dir: Path, tmp_path: Path) -> None:
    with serve(["--index", str(index_dir)], tmp_path, workers=1) as srv:
        s = _connect(srv, b"")
        try:
            for request in (
                b"GET /v1/info HTTP/1.1\r\nHost: x\r\n\r\n",
                b"POST /v1/rank HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                b'Content-Length: 17\r\n\r\n{"clue": "river"}',
            ):
                before = _data_segments_in(s)
                s.sendall(request)
                reply = _read_reply(s)
                assert reply.startswith(b"HTTP/1.1 200"), reply[:100]
                assert b'"candidates"' in reply or b'"worker_pid"' in reply
                # Status line, headers and body in one write: one segment on loopback
                # (two when the head is sent on its own).
                assert _data_segments_in(s) - before == 1
            # A HEAD reply has no body: its head still goes out, alone.
            s.sendall(b"HEAD /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
            head = b""
            while b"\r\n\r\n" not in head:
                chunk = s.recv(65536)
                assert chunk, "closed before the HEAD reply's head arrived"
                head += chunk
            assert head.startswith(b"HTTP/1.1 ") and head.endswith(b"\r\n\r\n")
        finally:
            s.close()
