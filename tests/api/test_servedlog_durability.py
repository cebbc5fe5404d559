"""The served log under failure: descriptors it no longer owns, full disks, torn lines, labels.

Unit tests drive ServedLog on real files; the service tests run a real `hunchwise serve`.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

from api.servedlog import ServedLog
from api.settings import settings_from_env
from reranker import LabelledLogError
from reranker.servedrecords import FEEDBACK, SERVED
from reranker.training import read_logs
from reranker.training.logs import LogReport
from tests.api.svc_helpers import read_jsonl, serving_client


def test_a_failed_reopen_never_closes_a_descriptor_it_does_not_own(tmp_path: Path) -> None:
    log = ServedLog(tmp_path, max_bytes=10**6, backups=3)
    log.append([{"i": 1}])
    (tmp_path / SERVED).unlink()
    (tmp_path / SERVED).mkdir()  # the file's name now holds a folder: the reopen fails
    with pytest.raises(IsADirectoryError):
        log.append([{"i": 2}])
    # Another part of the process opens a file now; it may get the log's old number.
    other = os.open(tmp_path / "other.txt", os.O_RDWR | os.O_CREAT, 0o644)
    (tmp_path / SERVED).rmdir()
    log.append([{"i": 3}])
    os.fstat(other)  # still open: the log did not close a descriptor it no longer owned
    os.write(other, b"mine")
    os.close(other)
    log.close()
    assert (tmp_path / "other.txt").read_bytes() == b"mine"
    assert [json.loads(x)["i"] for x in (tmp_path / SERVED).read_text().splitlines()] == [3]


def _waits_for_flock(inode: int) -> bool:
    """True when some process waits for an flock on this inode (Linux /proc/locks lists
    waiters as '->' lines; proc(5))."""
    for line in Path("/proc/locks").read_text().splitlines():
        fields = line.split()
        if "->" in fields and any(f.endswith(f":{inode}") for f in fields):
            return True
    return False


@pytest.mark.skipif(not Path("/proc/locks").exists(), reason="needs Linux /proc/locks")
def test_a_lock_file_made_again_is_the_one_locked(tmp_path: Path) -> None:
    folder = tmp_path / "log"
    old = ServedLog(folder, max_bytes=10**6, backups=3)  # a worker started before
    old.append([{"who": "before"}])
    shutil.rmtree(folder)  # the folder goes away and comes back
    with pytest.raises(FileNotFoundError):
        old.append([{"who": "lost"}])
    folder.mkdir()
    new = ServedLog(folder, max_bytes=10**6, backups=3)  # a worker started after
    held = os.open(folder / ".served.lock", os.O_RDWR)
    fcntl.flock(held, fcntl.LOCK_EX)  # as the new worker does while it appends
    writer = threading.Thread(target=old.append, args=([{"who": "old"}],))
    writer.start()
    deadline = time.monotonic() + 60  # a guard against hanging, not a timing assertion
    while writer.is_alive() and not _waits_for_flock(os.fstat(held).st_ino):
        assert time.monotonic() < deadline, "the old worker neither wrote nor waited"
        time.sleep(0.01)
    waited = writer.is_alive()
    new._served.path.write_bytes(b'{"who":"new"}\n')  # written while holding the lock
    fcntl.flock(held, fcntl.LOCK_UN)
    os.close(held)
    writer.join(timeout=60)
    assert waited, "the old worker appended without taking the lock the new one holds"
    assert [x["who"] for x in read_jsonl(folder / SERVED)] == ["new", "old"]
    old.close()
    new.close()


def test_an_unfinished_line_from_a_crash_is_cut_before_the_next_append(tmp_path: Path) -> None:
    whole = b'{"kind":"feedback","request_id":"r1","answer":"a1"}\n'
    (tmp_path / FEEDBACK).write_bytes(whole + b'{"kind":"feedback","request_id":"r2","ans')
    log = ServedLog(tmp_path, max_bytes=10**6, backups=3)
    log.append_feedback([{"kind": "feedback", "request_id": "r3", "answer": None}])
    log.close()
    assert [x["request_id"] for x in read_jsonl(tmp_path / FEEDBACK)] == ["r1", "r3"]
    assert log.repaired_bytes == len(b'{"kind":"feedback","request_id":"r2","ans')


def test_a_write_cut_short_leaves_no_torn_line(tmp_path: Path) -> None:
    # A real short write: the child process may not grow a file past 64 KiB (RLIMIT_FSIZE),
    # so its second batch (100 KiB) fails part-way with EFBIG.
    script = textwrap.dedent(
        f"""
        import resource, signal
        from api.servedlog import ServedLog
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, resource.RLIM_INFINITY))
        log = ServedLog({str(tmp_path)!r}, max_bytes=10**9, backups=2)
        log.append([{{"kind": "feedback", "i": 0}}])
        try:
            log.append([{{"kind": "feedback", "i": i, "pad": "x" * 1000}} for i in range(100)])
        except OSError as exc:
            print("failed", exc.errno)
        log.append([{{"kind": "feedback", "i": 200}}])
        """
    )
    out = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60, check=True
    )
    assert out.stdout.startswith("failed"), out.stdout + out.stderr
    lines = (tmp_path / SERVED).read_bytes().splitlines(keepends=True)
    assert all(line.endswith(b"\n") for line in lines)
    assert [json.loads(x)["i"] for x in lines] == [0, 200]  # the failed batch: all or nothing


def test_the_reader_skips_an_unfinished_last_line_and_counts_it(tmp_path: Path) -> None:
    good = '{"clue": "a river town", "answer": "a1"}\n'
    (tmp_path / "torn.jsonl").write_text(good + '{"clue": "half a li')
    report = LogReport()
    assert [c.answer for c in read_logs([tmp_path / "torn.jsonl"], report=report)] == ["a1"]
    assert report.torn_lines == 1
    # in the middle of a file the same line is damage, not an unfinished write
    (tmp_path / "bad.jsonl").write_text('{"clue": "half a li\n' + good)
    with pytest.raises(LabelledLogError, match=r"bad\.jsonl, line 1: malformed JSON"):
        read_logs([tmp_path / "bad.jsonl"])


def test_feedback_outlives_rotation_and_the_folder_reads_as_one_log(tmp_path: Path) -> None:
    log = ServedLog(tmp_path, max_bytes=1500, backups=2)
    for i in range(60):
        log.append([{"kind": "served", "request_id": f"r{i}", "clue": f"clue {i}",
                     "candidates": [], "pad": "z" * 60}])  # fmt: skip
        log.append_feedback([{"kind": "feedback", "request_id": f"r{i}", "answer": f"a{i}"}])
    log.close()
    feedback = read_jsonl(tmp_path / FEEDBACK)
    assert [f["request_id"] for f in feedback] == [f"r{i}" for i in range(60)]  # all kept
    report = LogReport()
    clues = read_logs([tmp_path], report=report)  # the folder: rotated, live and feedback
    served_kept = {x["request_id"] for f in log.files() if f.name != FEEDBACK
                   for x in read_jsonl(f)}  # fmt: skip
    assert {c.clue for c in clues} == {f"clue {r[1:]}" for r in served_kept}
    assert report.feedback_without_served == 60 - len(served_kept) > 0


@pytest.mark.server
def test_ranking_goes_on_when_the_log_cannot_be_written(
    index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    logs = tmp_path / "logs"
    with serving_client(index_dir, model_path, logs, tmp_path, workers=2) as c:
        body = {"clue": "This island exports pearls", "k": 3}
        assert c.post("/v1/rank", json=body).status_code == 200
        (logs / SERVED).unlink()
        (logs / SERVED).mkdir()  # the live file's name now holds a folder: writes fail
        (logs / FEEDBACK).mkdir()  # and so does the feedback file's
        for _ in range(6):  # one kept-alive connection: the same worker each time
            r = c.post("/v1/rank", json=body)
            assert r.status_code == 200 and r.json()["candidates"]
        rid = r.json()["request_id"]
        ready = c.get("/readyz")
        assert ready.status_code == 200
        failures = [
            line for line in c.get("/metrics").text.splitlines()
            if line.startswith("hunchwise_served_log_write_failures_total")
        ]  # fmt: skip
        assert failures and float(failures[0].split()[-1]) >= 1
        assert ready.json()["status"] == "degraded" and ready.json()["log_error"]
        # a label is refused while it cannot be stored, so the client can send it again
        fb = c.post("/v1/feedback", json={"request_id": rid, "answer": None})
        assert fb.status_code == 503 and "send it again" in fb.json()["detail"]
        (logs / SERVED).rmdir()
        (logs / FEEDBACK).rmdir()
        for _ in range(6):
            assert c.post("/v1/rank", json=body).status_code == 200
        assert c.post("/v1/feedback", json={"request_id": rid, "answer": None}).status_code == 200
    served = read_jsonl(logs / SERVED)
    assert served and all("features" not in cand for x in served for cand in x["candidates"])
    assert read_jsonl(logs / FEEDBACK)[-1]["request_id"] == rid


@pytest.mark.server
def test_feedback_token_and_logged_features_are_opt_in(
    index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    logs = tmp_path / "logs"
    env = {"HUNCHWISE_FEEDBACK_TOKEN": "label-key", "HUNCHWISE_LOG_FEATURES": "true"}
    with serving_client(index_dir, model_path, logs, tmp_path, env=env) as c:
        rid = c.post("/v1/rank", json={"clue": "a river town", "k": 2}).json()["request_id"]
        body = {"request_id": rid, "answer": None}
        assert c.post("/v1/feedback", json=body).status_code == 401
        bad = {"Authorization": "Bearer nope"}
        assert c.post("/v1/feedback", json=body, headers=bad).status_code == 401
        good = {"Authorization": "Bearer label-key"}
        assert c.post("/v1/feedback", json=body, headers=good).status_code == 200
    [served] = read_jsonl(logs / SERVED)
    assert all(cand["features"] for cand in served["candidates"])


@pytest.mark.parametrize("token", ["", "   "])
def test_an_empty_feedback_token_is_refused_not_taken_as_open(
    tmp_path: Path, token: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("HUNCHWISE_INDEX_DIR", str(tmp_path))
    monkeypatch.setenv("HUNCHWISE_FEEDBACK_TOKEN", token)
    with pytest.raises(ValueError, match="HUNCHWISE_FEEDBACK_TOKEN is set but empty"):
        settings_from_env()
