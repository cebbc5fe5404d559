"""Killing only the `hunchwise serve` parent ends its workers, so the port can be bound again."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import httpx
import pytest

from tests.api.svc_helpers import serve

pytestmark = [pytest.mark.slow, pytest.mark.server]

WAIT = 90.0  # generous bound on the waits below; nothing here measures how long they take


def _gone(pid: int) -> bool:
    """Whether a process has ended (a zombie nobody reaped yet counts as ended)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except FileNotFoundError:
        return True
    except OSError:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        return False
    return stat.rsplit(")", 1)[1].split()[0] == "Z"


def _worker_pids(url: str, n: int) -> set[int]:
    pids: set[int] = set()
    deadline = time.monotonic() + WAIT
    while len(pids) < n and time.monotonic() < deadline:
        # A new connection each time, so the kernel can hand it to either worker.
        with httpx.Client(base_url=url, timeout=WAIT) as c:
            pids.add(int(c.get("/v1/info").json()["worker_pid"]))
    return pids


def test_workers_end_with_their_parent(index_dir: Path, tmp_path: Path) -> None:
    workers: set[int] = set()
    try:
        with serve(["--index", str(index_dir)], tmp_path, workers=2) as srv:
            port = int(srv.url.rsplit(":", 1)[1])
            workers = _worker_pids(srv.url, 2)
            assert len(workers) == 2 and srv.proc.pid not in workers
            os.kill(srv.proc.pid, signal.SIGKILL)  # the parent only, not its process group
            srv.proc.wait(timeout=WAIT)
            deadline = time.monotonic() + WAIT
            while not all(_gone(p) for p in workers) and time.monotonic() < deadline:
                time.sleep(0.2)
            left = sorted(p for p in workers if not _gone(p))
            assert not left, f"workers {left} still running after the parent was killed"
        # A new server binds the same port and serves.
        with (
            serve(["--index", str(index_dir)], tmp_path, workers=2, port=port) as again,
            httpx.Client(base_url=again.url, timeout=WAIT) as c,
        ):
            assert c.get("/readyz").status_code == 200
    finally:
        for pid in workers:  # only when the test failed: do not leave them serving
            if not _gone(pid):
                os.kill(pid, signal.SIGKILL)


# A parent that starts one child running only the parent-pid watch (no prctl: the fallback
# for systems without it), prints the child's pid, then waits to be killed.
_PARENT = textwrap.dedent(
    """
    import os, subprocess, sys, time
    watch = "import sys; from api import parentwatch; parentwatch._watch(int(sys.argv[1]))"
    child = subprocess.Popen([sys.executable, "-c", watch, str(os.getpid())])
    print(child.pid, flush=True)
    time.sleep(600)
    """
)


def test_the_parent_watch_alone_ends_a_child_whose_parent_died() -> None:
    child = 0
    with subprocess.Popen(
        [sys.executable, "-c", _PARENT], stdout=subprocess.PIPE, text=True
    ) as parent:
        try:
            assert parent.stdout is not None
            child = int(parent.stdout.readline())
            assert not _gone(child)
            parent.kill()
            parent.wait(timeout=WAIT)
            deadline = time.monotonic() + WAIT
            while not _gone(child) and time.monotonic() < deadline:
                time.sleep(0.2)
            assert _gone(child), "the watch did not end the child after its parent died"
        finally:
            parent.kill()
            if child and not _gone(child):
                os.kill(child, signal.SIGKILL)
