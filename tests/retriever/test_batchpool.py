"""retriever/batchpool.py: chunks in order, threads kept between batches, a stalled thread
does not hold up the rest, errors reach the caller."""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Sequence

import pytest

from retriever import batchpool


@pytest.mark.parametrize("n", [0, 1, 5, 16, 17, 300, 1001])
@pytest.mark.parametrize("threads", [1, 2, 3])
@pytest.mark.parametrize("min_chunk", [1, 16])
def test_chunks_cover_the_items_in_order(n: int, threads: int, min_chunk: int) -> None:
    bounds = batchpool.chunk_bounds(n, threads, min_chunk)
    assert [i for lo, hi in bounds for i in range(lo, hi)] == list(range(n))
    sizes = [hi - lo for lo, hi in bounds]
    if n >= min_chunk and sizes:
        assert min(sizes) >= min_chunk
        assert max(sizes) - min(sizes) <= 1
    assert len(bounds) <= max(1, threads * batchpool.CHUNKS_PER_THREAD)
    items = list(range(n))
    got = batchpool.map_chunks(
        lambda part: [x * 2 for x in part], items, threads, min_chunk=min_chunk
    )
    assert got == [x * 2 for x in items]


def test_threads_and_their_locals_outlive_a_batch() -> None:
    # What a thread keeps (an index's score buffers) is made once, not on every batch.
    local = threading.local()
    made: list[int] = []

    def fn(part: Sequence[int]) -> list[int]:
        if not hasattr(local, "buf"):
            local.buf = bytearray(8)
            made.append(threading.get_ident())
        return list(part)

    items = list(range(64))
    for _ in range(5):
        assert batchpool.map_chunks(fn, items, 2, min_chunk=4) == items
    # the caller's thread and at most one pool thread, each once, over five batches
    assert len(made) == len(set(made)) <= 2


def test_a_stalled_thread_leaves_its_share_to_the_others() -> None:
    # The thread holding the first chunk waits until every other chunk is done: with one
    # fixed half per thread it would wait for its own second half forever.
    items = list(range(40))
    bounds = batchpool.chunk_bounds(len(items), 2, 4)
    rest_done = threading.Event()
    done: list[int] = []
    lock = threading.Lock()

    def fn(part: Sequence[int]) -> list[int]:
        if part[0] == 0:
            assert rest_done.wait(timeout=30), "the other chunks were not taken"
        else:
            with lock:
                done.append(part[0])
                if len(done) == len(bounds) - 1:
                    rest_done.set()
        return list(part)

    assert batchpool.map_chunks(fn, items, 2, min_chunk=4) == items


def test_an_error_in_a_chunk_reaches_the_caller() -> None:
    def fn(part: Sequence[int]) -> list[int]:
        if 13 in part:
            raise ValueError("chunk with 13")
        return list(part)

    with pytest.raises(ValueError, match="chunk with 13"):
        batchpool.map_chunks(fn, list(range(100)), 2, min_chunk=4)
    # the pool still works afterwards
    assert batchpool.map_chunks(lambda p: list(p), list(range(100)), 2, min_chunk=4) == list(
        range(100)
    )


def test_a_batch_inside_a_batch_finishes() -> None:
    def inner(part: Sequence[int]) -> list[int]:
        return [x + 1 for x in part]

    def outer(part: Sequence[int]) -> list[int]:
        return batchpool.map_chunks(inner, list(part), 2, min_chunk=2)

    items = list(range(200))
    assert batchpool.map_chunks(outer, items, 2, min_chunk=8) == [x + 1 for x in items]


def test_a_batch_waits_for_no_helper_that_another_batch_holds_up() -> None:
    # Another batch keeps every pool thread busy; this batch's caller does every chunk and
    # returns while that batch is still held up.
    batchpool.map_chunks(lambda p: list(p), list(range(8)), 2, min_chunk=1)
    busy = batchpool._pool_size + 1  # every pool thread and the other batch's caller
    release = threading.Event()
    started = threading.Semaphore(0)

    def slow(part: Sequence[int]) -> list[int]:
        started.release()
        assert release.wait(timeout=30)
        return list(part)

    other = threading.Thread(target=batchpool.map_chunks, args=(slow, list(range(busy)), busy))
    other.start()
    try:
        for _ in range(busy):
            assert started.acquire(timeout=30)
        got = batchpool.map_chunks(lambda p: [x + 1 for x in p], list(range(8)), 2)
        assert got == list(range(1, 9))
        assert other.is_alive()  # this batch did not wait for the other one to end
    finally:
        release.set()
        other.join()


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_a_forked_child_can_run_a_batch() -> None:
    batchpool.map_chunks(lambda p: list(p), list(range(8)), 2)  # the parent's pool exists
    pid = os.fork()
    if pid == 0:  # the child: its pool's threads were not copied
        ok = batchpool.map_chunks(lambda p: [x * 3 for x in p], list(range(40)), 2) == [
            x * 3 for x in range(40)
        ]
        os._exit(0 if ok else 1)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            assert os.waitstatus_to_exitcode(status) == 0
            return
        time.sleep(0.05)
    os.kill(pid, 9)
    os.waitpid(pid, 0)
    pytest.fail("the forked child's batch did not finish")
