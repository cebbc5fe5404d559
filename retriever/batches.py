"""Batches of clues shared between threads: how many threads a batch gets, and the work
done on contiguous parts of it, one thread each, results in the batch's order."""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

from .counting import cores

T = TypeVar("T")

BATCH_THREADS_FROM = 64  # clues in a batch before it is shared between threads


def batch_threads(n_clues: int, threads: int | None) -> int:
    """Threads for a batch of `n_clues`: `threads` when given (at least 1), else one per core
    this process may use for batches of BATCH_THREADS_FROM clues or more (a smaller batch
    is over before the threads pay for themselves); never more than the clues."""
    if threads is not None and threads < 1:
        raise ValueError(f"threads must be at least 1, got {threads}")
    if threads is None:
        threads = cores() if n_clues >= BATCH_THREADS_FROM else 1
    return max(1, min(threads, n_clues))


def map_parts(work: Callable[[slice], list[T]], n_items: int, threads: int, name: str) -> list[T]:
    """`work` on `threads` contiguous slices of a batch of `n_items` (the last one shorter),
    each on a thread named after `name`; the results joined in the batch's order."""
    step = -(-n_items // threads)
    parts = [slice(i, i + step) for i in range(0, n_items, step)]
    with ThreadPoolExecutor(len(parts), thread_name_prefix=name) as pool:
        return [item for done in pool.map(work, parts) for item in done]
