"""Worker processes end with the `hunchwise serve` process that started them.

uvicorn's workers inherit the listening socket. If only the parent dies (SIGKILL, OOM
killer), they keep serving the port, nobody supervises them, and a new server cannot bind
it. Each worker therefore asks the kernel for SIGTERM when its parent dies (Linux
prctl(PR_SET_PDEATHSIG)), and also runs a thread that checks its parent pid, for systems
without prctl. SIGTERM is uvicorn's graceful shutdown: requests in flight finish first.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import signal
import sys
import threading

PARENT_ENV = "HUNCHWISE_SERVE_PID"
"""Set by `hunchwise serve` to its own pid; workers compare their parent pid against it."""
CHECK_SECONDS = 1.0
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


def _ask_kernel(sig: int) -> bool:
    """Linux: have the kernel send `sig` to this process when its parent dies."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        return int(libc.prctl(_PR_SET_PDEATHSIG, sig, 0, 0, 0)) == 0
    except (OSError, AttributeError):
        return False


def _watch(parent: int) -> None:
    stop = threading.Event()
    while not stop.wait(CHECK_SECONDS):
        if os.getppid() != parent:
            os.kill(os.getpid(), signal.SIGTERM)
            return


def end_with_parent() -> None:
    """In a worker of `hunchwise serve`: end (SIGTERM) when the serving parent is gone.

    Does nothing in the parent itself (a single worker runs there) or outside `serve`.
    """
    value = os.environ.get(PARENT_ENV, "")
    if not value.isdigit() or int(value) == os.getpid():
        return
    parent = int(value)
    _ask_kernel(signal.SIGTERM)
    # The parent may have died before the request above: then nothing would be sent.
    if os.getppid() != parent:
        os.kill(os.getpid(), signal.SIGTERM)
        return
    threading.Thread(target=_watch, args=(parent,), name="hunchwise-parent", daemon=True).start()
