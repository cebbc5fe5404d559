"""Helpers of the multi-worker service tests: find the workers, read their memory, raw posts."""

from __future__ import annotations

import contextlib
import socket
import time
from collections.abc import Callable
from typing import Any

import httpx

from tests.api.svc_helpers import HOST


def worker_pids(url: str, workers: int, timeout: float = 30) -> set[int]:
    """Process ids of the workers, as /v1/info reports them over fresh connections."""
    pids: set[int] = set()
    deadline = time.monotonic() + timeout
    while len(pids) < workers and time.monotonic() < deadline:
        with httpx.Client(base_url=url, timeout=10) as c:
            pids.add(int(c.get("/v1/info").json()["worker_pid"]))
    assert len(pids) == workers, pids
    return pids


def every_worker(
    url: str, check: Callable[[dict[str, Any]], bool], workers: int = 2, timeout: float = 30
) -> dict[int, dict[str, Any]]:
    """Poll /v1/info over fresh connections until `workers` distinct workers pass `check`.

    Returns the last passing /v1/info of each worker (fewer entries if time ran out).
    """
    ok: dict[int, dict[str, Any]] = {}
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and len(ok) < workers:
        with httpx.Client(base_url=url, timeout=10) as c:
            info = c.get("/v1/info").json()
        if check(info):
            ok[info["worker_pid"]] = info
        time.sleep(0.02)
    return ok


def memory_kb(pid: int) -> dict[str, int]:
    """VmRSS and VmHWM (peak resident size) of a process, in kB, from /proc/PID/status."""
    out = {}
    with open(f"/proc/{pid}/status", encoding="ascii") as f:
        for line in f:
            name, _, value = line.partition(":")
            if name in ("VmRSS", "VmHWM"):
                out[name] = int(value.split()[0])
    return out


def reset_peak(pid: int) -> None:
    """Set VmHWM back to the current RSS (Linux proc(5): writing 5 to /proc/PID/clear_refs)."""
    with open(f"/proc/{pid}/clear_refs", "w", encoding="ascii") as f:
        f.write("5")


def raw_post(port: int, path: str, body: bytes, headers: dict[str, str]) -> bytes:
    """POST over a plain socket; returns the status line (the server may answer before the
    whole body is sent, so this does not insist on sending all of it)."""
    head = (
        f"POST {path} HTTP/1.1\r\nHost: {HOST}\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(body)}\r\nConnection: close\r\n"
        + "".join(f"{k}: {v}\r\n" for k, v in headers.items())
        + "\r\n"
    ).encode("latin-1")
    with socket.create_connection((HOST, port), timeout=60) as s:
        # The server may answer and close early; the answer is still there to read.
        with contextlib.suppress(BrokenPipeError, ConnectionResetError):
            s.sendall(head + body)
        data = b""
        while b"\r\n" not in data:
            chunk = s.recv(4096)
            if not chunk:
                break
            data += chunk
    return data.split(b"\r\n", 1)[0]
