"""A batch of work shared between threads: one pool kept for the process, chunks taken in turn.

`Index.search_many` splits its clues into chunks and calls `map_chunks`; each thread (the
caller's among them) takes the next chunk until none is left. Two things this does that a
fresh ThreadPoolExecutor over one half per thread did not:

- The threads live on between batches, so what they keep per thread (an index's score
  buffer and scratch, `threading.local`) is allocated once, not on every call.
- A thread whose core is taken by another process does fewer chunks instead of holding up
  the batch: with one static half per thread, the batch took as long as its slower half,
  and on a shared 2-core machine two threads were often slower than one.

The caller works too, so a batch finishes even when every pool thread is busy elsewhere
(a batch started from inside another batch cannot wait on itself).
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import TypeVar

T = TypeVar("T")
R = TypeVar("R")

CHUNKS_PER_THREAD = 4  # enough to even out a slow thread, few enough to keep per-chunk costs low

_lock = threading.Lock()
_pool: ThreadPoolExecutor | None = None
_pool_size = 0


def _executor(workers: int) -> ThreadPoolExecutor:
    """The process's pool, with at least `workers` threads (replaced by a bigger one if not)."""
    global _pool, _pool_size
    with _lock:
        if _pool is None or _pool_size < workers:
            old = _pool
            _pool = ThreadPoolExecutor(workers, thread_name_prefix="hunchwise-batch")
            _pool_size = workers
            if old is not None:
                old.shutdown(wait=False)
        return _pool


def _forget_pool() -> None:
    """In a forked child the pool's threads do not exist: start a new pool when needed."""
    global _pool, _pool_size, _lock
    _pool, _pool_size, _lock = None, 0, threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def chunk_bounds(n: int, threads: int, min_chunk: int) -> list[tuple[int, int]]:
    """(start, end) of consecutive chunks covering range(n): about CHUNKS_PER_THREAD per
    thread, none smaller than `min_chunk` (unless n itself is), sizes differing by at most 1."""
    if n <= 0:
        return []
    count = max(1, min(threads * CHUNKS_PER_THREAD, n // max(1, min_chunk)))
    size, extra = divmod(n, count)
    bounds, at = [], 0
    for i in range(count):
        end = at + size + (1 if i < extra else 0)
        bounds.append((at, end))
        at = end
    return bounds


def map_chunks(
    fn: Callable[[Sequence[T]], list[R]],
    items: Sequence[T],
    threads: int,
    *,
    min_chunk: int = 1,
) -> list[R]:
    """fn over consecutive chunks of `items` on up to `threads` threads; the results
    concatenated in the order of `items`. An exception raised by fn is raised here once
    every thread has stopped."""
    bounds = chunk_bounds(len(items), threads, min_chunk)
    if threads <= 1 or len(bounds) <= 1:
        return fn(items)
    parts: list[list[R] | None] = [None] * len(bounds)
    take = iter(range(len(bounds)))
    take_lock = threading.Lock()

    def work() -> None:
        while True:
            with take_lock:
                i = next(take, None)
            if i is None:
                return
            lo, hi = bounds[i]
            try:
                parts[i] = fn(items[lo:hi])
            except BaseException:
                with take_lock:
                    for _ in take:  # the other threads stop at their next chunk
                        pass
                raise

    helpers = min(threads, len(bounds)) - 1
    pool = _executor(helpers)
    futures: list[Future[None]] = [pool.submit(work) for _ in range(helpers)]
    try:
        work()
    finally:
        for f in futures:
            # A helper still queued (the pool busy with another batch) is not waited for:
            # no chunk is left for it. A running one is.
            if not f.cancel():
                f.exception()
    for f in futures:
        if not f.cancelled():
            f.result()  # raises a helper's exception
    out: list[R] = []
    for part in parts:
        assert part is not None
        out.extend(part)
    return out
