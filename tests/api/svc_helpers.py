"""Helpers of the service tests: run `hunchwise serve` as a real process on loopback, read logs."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest
from starlette.exceptions import StarletteDeprecationWarning

with warnings.catch_warnings():
    # Starlette warns at import when only httpx (not httpx2) is installed; harmless here.
    warnings.simplefilter("ignore", StarletteDeprecationWarning)
    from fastapi.testclient import TestClient

__all__ = ["TestClient"]

ADMIN_TOKEN = "test-admin-token-0123456789"
HOST = "127.0.0.1"


def admin_headers(token: str = ADMIN_TOKEN) -> dict[str, str]:
    """Authorization header for the admin endpoints."""
    return {"Authorization": f"Bearer {token}"}


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    """Every line of a JSON-lines file, parsed (fails on any broken line)."""
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def replies_ok(
    server: Server, requests: Sequence[tuple[str, str, dict[str, Any] | None]]
) -> list[dict[str, Any]]:
    """Send each (method, path, JSON body or None) to `server` in order on one connection;
    every reply must be a 200. Their JSON bodies."""
    with httpx.Client(base_url=server.url, timeout=60) as c:
        replies = [c.request(method, path, json=body) for method, path, body in requests]
    assert all(r.status_code == 200 for r in replies), [r.text for r in replies[:3]]
    return [r.json() for r in replies]


def same_rankings(
    labels: Sequence[object],
    expected: Sequence[dict[str, Any]],
    got: Sequence[dict[str, Any]],
    *,
    features: bool = False,
) -> int:
    """Assert that each rank reply in `got` ranks as the one in `expected` (the same
    candidates in order, scores, probabilities to 1e-12, decision; with `features`, the same
    features too); `labels` name the replies in a failure. How many candidates it compared."""
    compared = 0
    for label, want, have in zip(labels, expected, got, strict=True):
        assert [c["id"] for c in have["candidates"]] == [c["id"] for c in want["candidates"]], label
        for cw, ch in zip(want["candidates"], have["candidates"], strict=True):
            assert ch["score"] == cw["score"], (label, cw["id"])
            assert ch["probability"] == pytest.approx(cw["probability"], abs=1e-12, rel=0)
            if features:
                assert ch["features"] == cw["features"], (label, cw["id"])
            compared += 1
        assert have["decision"] == want["decision"], label
    return compared


def free_port() -> int:
    """A TCP port on loopback that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


def cli(args: Sequence[str], *, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    """Run `hunchwise ARGS` (as python -m api.cli) and fail the test on a non-zero exit."""
    proc = subprocess.run(
        [sys.executable, "-m", "api.cli", *args], capture_output=True, text=True, timeout=timeout
    )
    if proc.returncode != 0:
        raise AssertionError(f"hunchwise {' '.join(args)} exited {proc.returncode}:\n{proc.stderr}")
    return proc


@dataclass
class Server:
    """A running `hunchwise serve` process."""

    url: str
    proc: subprocess.Popen[bytes]
    output: Path

    def log_text(self) -> str:
        """What the server printed so far."""
        return self.output.read_text(encoding="utf-8", errors="replace")


def _clean_env(extra: dict[str, str]) -> dict[str, str]:
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith("HUNCHWISE_") and k != "PROMETHEUS_MULTIPROC_DIR"
    }
    env.update(extra)
    return env


def wait_ready(server: Server, workers: int, timeout: float) -> None:
    """Wait until /readyz answers 200 and `workers` distinct worker pids have answered."""
    deadline = time.monotonic() + timeout
    pids: set[int] = set()
    while time.monotonic() < deadline:
        if server.proc.poll() is not None:
            raise AssertionError(
                f"server exited with {server.proc.returncode}:\n{server.log_text()}"
            )
        try:
            # A new connection each time, so the kernel can hand it to any worker.
            with httpx.Client(base_url=server.url, timeout=5) as c:
                if c.get("/readyz").status_code == 200:
                    pids.add(int(c.get("/v1/info").json()["worker_pid"]))
        except httpx.TransportError:
            pass
        if len(pids) >= workers:
            return
        time.sleep(0.05)
    raise AssertionError(
        f"server not ready after {timeout} s (pids seen {pids}):\n{server.log_text()}"
    )


def serve_args(index_dir: Path, model_path: Path, logs: Path) -> list[str]:
    """`hunchwise serve` options for an index, a model and a served-log folder."""
    return ["--index", str(index_dir), "--model", str(model_path), "--log-dir", str(logs)]


def serve_command(args: Sequence[str], port: int, workers: int) -> list[str]:
    """The command line of `hunchwise serve ARGS` on loopback at `port`."""
    host = ["--host", HOST, "--port", str(port), "--workers", str(workers)]
    return [sys.executable, "-m", "api.cli", "serve", *args, *host]


@contextlib.contextmanager
def serve(
    args: Sequence[str],
    workdir: Path,
    *,
    workers: int = 1,
    env: dict[str, str] | None = None,
    ready_timeout: float = 90,
    port: int | None = None,
    prefix: Sequence[str] = (),
) -> Iterator[Server]:
    """Start `hunchwise serve ARGS` on loopback (a free port unless given); SIGINT at the end.

    `prefix` runs the server through a wrapper command (which must exec the rest).
    """
    port = port if port is not None else free_port()
    output = workdir / f"server-{port}.out"
    cmd = [*prefix, *serve_command(args, port, workers)]
    with open(output, "wb") as out:
        proc = subprocess.Popen(
            cmd,
            stdout=out,
            stderr=subprocess.STDOUT,
            env=_clean_env(env or {}),
            start_new_session=True,
        )
    server = Server(f"http://{HOST}:{port}", proc, output)
    try:
        wait_ready(server, workers, ready_timeout)
        yield server
    finally:
        stop(server)


@contextlib.contextmanager
def serving_client(
    index_dir: Path, model_path: Path, logs: Path, workdir: Path, **options: Any
) -> Iterator[httpx.Client]:
    """One kept-alive client of `hunchwise serve` on an index and a model, its served log in
    `logs` (`options` as `serve` takes them: workers, env, ...)."""
    args = serve_args(index_dir, model_path, logs)
    with (
        serve(args, workdir, **options) as server,
        httpx.Client(base_url=server.url, timeout=30) as client,
    ):
        yield client


def stop(server: Server, timeout: float = 30) -> int:
    """Clean shutdown (SIGINT, as Ctrl-C); kill the process group only if it hangs."""
    if server.proc.poll() is None:
        server.proc.send_signal(signal.SIGINT)
        try:
            server.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(server.proc.pid, signal.SIGKILL)
            server.proc.wait(timeout=10)
            raise AssertionError(f"server did not stop on SIGINT:\n{server.log_text()}") from None
    return int(server.proc.returncode)
