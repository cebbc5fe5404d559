"""The README's first quick-start line (`hunchwise demo`), run for real as a user would."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

ENV = {**os.environ, "PYTHONUNBUFFERED": "1"}


def _hunchwise() -> list[str]:
    # The console script when installed, else the same entry point through the interpreter.
    exe = Path(sys.executable).with_name("hunchwise")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "api.cli"]


def _demo_without_serving(out: Path, timeout: float) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [*_hunchwise(), "demo", "--no-serve", "--out", str(out)],
        capture_output=True,
        text=True,
        env=ENV,
        timeout=timeout,
    )


def test_demo_out_naming_a_file_is_a_plain_error(tmp_path: Path) -> None:
    taken = tmp_path / "notes.txt"
    taken.write_text("keep me\n")
    proc = _demo_without_serving(taken, timeout=300)
    assert proc.returncode != 0 and proc.stderr.count("\n") == 1
    assert f"{taken} is a file, not a folder" in proc.stderr and "Errno" not in proc.stderr
    assert taken.read_text() == "keep me\n"


def test_demo_on_a_port_in_use_stops_before_any_work(tmp_path: Path) -> None:
    # Something else listens on the port: the demo must not send its sample clue there and
    # take that service's answer for its own.
    with socket.socket() as other:
        other.bind(("127.0.0.1", 0))
        other.listen()
        port = other.getsockname()[1]
        proc = subprocess.run(
            [*_hunchwise(), "demo", "--out", str(tmp_path / "demo"), "--port", str(port)],
            capture_output=True,
            text=True,
            env=ENV,
            timeout=120,
        )
    assert proc.returncode != 0
    assert f"port {port} on 127.0.0.1 is already in use" in proc.stderr
    assert not (tmp_path / "demo").exists()


def test_demo_without_serving_builds_trains_evaluates_and_reports(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    proc = _demo_without_serving(out, timeout=900)
    assert proc.returncode == 0, proc.stderr[-2000:]
    text = proc.stdout
    for heading in ("clue level", "candidate level", "feature ablation", "top_candidate_ece"):
        assert heading in text
    assert "next: hunchwise serve" in text
    metrics = json.loads((out / "report" / "metrics.json").read_text())
    model = json.loads((out / "model.json").read_text())
    assert model["format"] == "hunchwise-model"
    # The reranked model must beat both yardsticks on held-out clues (log-loss, candidate level).
    cand = metrics["candidate"]
    assert cand["model"]["log_loss"] < cand["bm25_only"]["log_loss"] < cand["all_wrong"]["log_loss"]
    assert metrics["clue"]["top1_reranked"] >= metrics["clue"]["top1_bm25"]
    html = (out / "report" / "report.html").read_text()
    assert "data:image/png;base64," in html


def test_demo_serves_answers_a_sample_clue_and_stops_on_ctrl_c(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    errors = tmp_path / "stderr.txt"
    with (
        open(errors, "w") as err,
        subprocess.Popen(
            [*_hunchwise(), "demo", "--out", str(out), "--port", "0", "--no-ablation"],
            stdout=subprocess.PIPE,
            stderr=err,
            text=True,
            env=ENV,
        ) as proc,
    ):
        try:
            text = _read_until_serving(proc)
            assert "Press Ctrl-C" in text, text[-2000:] + errors.read_text()[-3000:]
            reply = text.split("sample response", 1)[1].split(":\n", 1)[1]
            reply = reply.split("\n\ntry it yourself", 1)[0]
            response = json.loads(reply)
            request = json.loads(text.split("/v1/rank\n", 1)[1].split("\nsample response", 1)[0])
            # the printout shows what was asked for, with numbers rounded for people
            assert len(response["candidates"]) == request["k"] == 3, response
            assert all(float(f"{x:.3g}") == x for x in _floats(response)), reply
            # the try-it clue is cut at a word boundary of the sample clue
            tried = json.loads(text.split("-d '", 1)[1].split("'", 1)[0])["clue"]
            assert (request["clue"] + " ").startswith(tried + " "), (tried, request["clue"])
            assert response["decision"]["action"] in ("answer", "wait")
            assert 0.0 <= response["candidates"][0]["probability"] <= 1.0
            assert "curl -s http://127.0.0.1:" in text
            proc.send_signal(signal.SIGINT)
            assert proc.wait(timeout=60) == 0
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    served = (out / "logs" / "served.jsonl").read_text().splitlines()
    assert len(served) == 1 and json.loads(served[0])["kind"] == "served"


def _floats(value: object) -> list[float]:
    """Every float in a JSON value."""
    if isinstance(value, float):
        return [value]
    if isinstance(value, dict):
        return [x for v in value.values() for x in _floats(v)]
    if isinstance(value, list):
        return [x for v in value for x in _floats(v)]
    return []


def _read_until_serving(proc: subprocess.Popen[str]) -> str:
    """The demo's output up to its 'Press Ctrl-C' line (or its end, if it stops early)."""
    assert proc.stdout is not None
    lines: list[str] = []
    deadline = time.monotonic() + 900
    for line in proc.stdout:
        lines.append(line)
        if "Press Ctrl-C" in line or time.monotonic() > deadline:
            break
    return "".join(lines)
