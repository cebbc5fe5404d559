"""`hunchwise train` and `hunchwise evaluate`, run as real subprocesses on the small world."""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from api.cli.options import byte_size
from tests.reranker.conftest import REPO, World

HERE = Path(__file__).resolve().parents[1] / "reranker"  # userfeatures.py, an example user module


def hunchwise(*args: str | Path) -> subprocess.CompletedProcess[str]:
    """Run the `hunchwise` entry point (api.cli:main) in a fresh interpreter."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE), str(REPO)]))
    return subprocess.run(
        [sys.executable, "-m", "api.cli", *map(str, args)],
        capture_output=True,
        text=True,
        env=env,
        cwd=REPO,
        timeout=300,
    )


@pytest.mark.slow
def test_train_then_evaluate(world: World, tmp_path: Path) -> None:
    model = tmp_path / "model.json"
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", model,
        "--feature", "userfeatures:title_chars", "--reward", "1", "--penalty", "3", "--json",
        "--reward-fall", "0.5", "--cost-per-word", "0.01", "--abstain-if-none", "0.9",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    summary = json.loads(out.stdout)
    art = json.loads(model.read_text())
    assert summary["model_version"] == art["model_version"]
    assert summary["unresolved_answers"] == world.n_unresolved_train
    assert "user:title_chars" in art["feature_names"]
    assert art["decision"]["break_even"] == 0.75
    pay = art["decision"]["payoff"]
    assert (pay["reward_fall"], pay["cost_per_word"]) == (0.5, 0.01)
    assert art["decision"]["schedule"]["none_abstain"] == 0.9

    report = tmp_path / "report"
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log, "--model", model,
        "--report", report, "--feature", "userfeatures:title_chars", "--no-ablation",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    assert "top-1 accuracy" in out.stdout and str(report / "report.html") in out.stdout
    assert (report / "metrics.json").exists() and (report / "report.html").exists()
    assert list(report.glob("*.png"))
    metrics = json.loads((report / "metrics.json").read_text())
    assert metrics["data"]["model_version"] == art["model_version"]
    # the model's payoff (speed included) scores the three rules; the curve is drawn
    assert metrics["speed"]["payoff"] == pay
    assert set(metrics["speed"]["rules"]) == {"schedule", "one_threshold", "whole_clue"}
    assert "answering early" in out.stdout and (report / "payoff.png").exists()

    # Without the user feature the model cannot load: one-line error naming the feature.
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log, "--model", model,
        "--report", tmp_path / "r2", "--no-ablation",
    )  # fmt: skip
    assert out.returncode != 0
    assert out.stderr.count("\n") == 1 and "user:title_chars" in out.stderr


@pytest.mark.slow
def test_bad_log_line_is_a_one_line_error_and_skip_bad_counts(world: World, tmp_path: Path) -> None:
    lines = world.train_log.read_text().splitlines()
    log = tmp_path / "log.jsonl"
    log.write_text("\n".join([*lines[:10], '{"clue": 3, "answer": "w001"}', *lines[10:]]) + "\n")
    model = tmp_path / "model.json"
    out = hunchwise("train", "--index", world.index.path, "--log", log, "--out", model)
    assert out.returncode != 0
    assert out.stderr.count("\n") == 1
    assert out.stderr.startswith("hunchwise: error: ")
    assert f"{log}, line 11, field 'clue': must be a string" in out.stderr
    assert not model.exists()

    out = hunchwise(
        "train", "--index", world.index.path, "--log", log, "--out", model, "--skip-bad",
        "--features", "bm25_score,matched_terms",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    assert any(line.split()[:2] == ["skipped_lines", "1"] for line in out.stdout.splitlines()), (
        out.stdout
    )
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", log, "--model", model,
        "--report", tmp_path / "rep", "--no-ablation", "--skip-bad", "--json",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["metrics"]["data"]["skipped_lines"] == 1


def _served_and_feedback(world: World, n: int) -> list[dict[str, object]]:
    """What the service would have logged for the first n training clues, labelled."""
    clues = [json.loads(line) for line in world.train_log.read_text().splitlines()][:n]
    lines: list[dict[str, object]] = []
    for i, c in enumerate(clues):
        lines.append({"kind": "served", "request_id": f"r{i}", "clue": c["clue"], "candidates": []})
        lines.append({"kind": "feedback", "request_id": f"r{i}", "answer": c["answer"]})
    return lines


def _write(path: Path, lines: list[dict[str, object]], tail: str = "") -> None:
    path.write_text("".join(json.dumps(x) + "\n" for x in lines) + tail)


@pytest.mark.slow
def test_served_log_folders_old_and_new_train_and_count_an_unfinished_line(
    world: World, tmp_path: Path
) -> None:
    lines = _served_and_feedback(world, 60)
    old = tmp_path / "old"  # one file holding both kinds, as logs were written before
    old.mkdir()
    _write(old / "served.jsonl", lines, '{"kind": "served", "request_id": "r99", "cl')
    new = tmp_path / "new"  # served lines rotated in two files, labels in their own file
    new.mkdir()
    served = [x for x in lines if x["kind"] == "served"]
    _write(new / "served.1.jsonl", served[:30])
    _write(new / "served.jsonl", served[30:])
    _write(new / "feedback.jsonl", [x for x in lines if x["kind"] == "feedback"])
    for folder, torn in ((old, 1), (new, 0)):
        model = tmp_path / f"{folder.name}.json"
        out = hunchwise(
            "train", "--index", world.index.path, "--log", folder, "--out", model,
            "--features", "bm25_score,matched_terms", "--json",
        )  # fmt: skip
        assert out.returncode == 0, out.stderr
        summary = json.loads(out.stdout)
        assert (summary["clues"], summary["unfinished_last_lines"]) == (60, torn)
        out = hunchwise(
            "evaluate", "--index", world.index.path, "--log", folder, "--model", model,
            "--report", tmp_path / f"{folder.name}-report", "--no-ablation", "--json",
        )  # fmt: skip
        assert out.returncode == 0, out.stderr
        assert json.loads(out.stdout)["metrics"]["data"]["torn_lines"] == torn


@pytest.mark.slow
def test_bad_options_and_missing_files(world: World, tmp_path: Path) -> None:
    out = hunchwise(
        "train", "--index", world.index.path, "--log", tmp_path / "none.jsonl",
        "--out", tmp_path / "m.json",
    )  # fmt: skip
    assert out.returncode != 0 and "file not found" in out.stderr
    assert out.stderr.count("\n") == 1
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log,
        "--out", tmp_path / "m.json", "--prefixes", "0.5,2",
    )  # fmt: skip
    assert out.returncode == 2 and "prefix fractions" in out.stderr
    (tmp_path / "junk.json").write_text("{not json")
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log,
        "--model", tmp_path / "junk.json", "--report", tmp_path / "rep",
    )  # fmt: skip
    assert out.returncode != 0 and "not valid JSON" in out.stderr
    assert out.stderr.count("\n") == 1
    # evaluate scores the model on the candidate sets it was trained on: its own k
    model = tmp_path / "m20.json"
    ok = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", model,
        "--features", "bm25_score,score_softmax",
    )  # fmt: skip
    assert ok.returncode == 0, ok.stderr
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log,
        "--model", model, "--report", tmp_path / "rep", "-k", "5", "--no-ablation",
    )  # fmt: skip
    assert out.returncode != 0 and out.stderr.count("\n") == 1
    assert "-k 5" in out.stderr and "model's k (20)" in out.stderr
    assert not (tmp_path / "rep").exists()


@pytest.mark.parametrize(
    ("option", "value", "message"),
    [
        ("--reward-fall", "1.5", "expected a number between 0 and 1, got '1.5'"),
        ("--reward-fall", "half", "expected a number between 0 and 1, got 'half'"),
        ("--cost-per-word", "-0.1", "expected a number of at least 0, got '-0.1'"),
        ("--cost-per-word", "inf", "expected a number of at least 0, got 'inf'"),
        ("--abstain-if-none", "nan", "expected a number between 0 and 1, got 'nan'"),
        ("--sample-rows", "0", "expected a whole number of at least 1, got '0'"),
        ("--sample-rows", "1e3", "expected a whole number of at least 1, got '1e3'"),
    ],
)
def test_speed_options_are_checked_before_anything_runs(
    tmp_path: Path, option: str, value: str, message: str
) -> None:
    out = hunchwise(
        "train", "--index", tmp_path / "idx", "--log", tmp_path / "log.jsonl",
        "--out", tmp_path / "m.json", option, value,
    )  # fmt: skip
    assert out.returncode == 2 and f"argument {option}: {message}" in out.stderr, out.stderr
    assert not (tmp_path / "m.json").exists()


def test_sample_rows_without_ray_is_an_error(tmp_path: Path) -> None:
    out = hunchwise(
        "train", "--index", tmp_path / "idx", "--log", tmp_path / "log.jsonl",
        "--out", tmp_path / "m.json", "--sample-rows", "500",
    )  # fmt: skip
    assert out.returncode != 0 and out.stderr.count("\n") == 1
    assert "--sample-rows" in out.stderr and "--ray" in out.stderr, out.stderr
    assert not (tmp_path / "m.json").exists()


@pytest.mark.slow
@pytest.mark.parametrize("command", ["train", "evaluate"])
def test_k_below_one_is_an_error(world: World, tmp_path: Path, command: str) -> None:
    model = tmp_path / "model.json"
    extra = ["--out", model] if command == "train" else ["--model", model, "--report", tmp_path]
    out = hunchwise(
        command, "--index", world.index.path, "--log", world.train_log, "-k", "0", *extra
    )
    assert out.returncode != 0
    assert out.stderr.count("\n") == 1 and "-k must be at least 1" in out.stderr
    assert not model.exists()


def test_version_prints_the_installed_version() -> None:
    from importlib.metadata import version

    out = hunchwise("--version")
    assert out.returncode == 0 and out.stdout.strip() == f"hunchwise {version('hunchwise')}"


def _stderr_on_a_terminal(*args: str | Path) -> tuple[int, str]:
    """Run hunchwise with its stderr on a pseudo-terminal (as in a shell); return code, stderr."""
    import fcntl
    import pty
    import struct
    import termios
    import threading

    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE), str(REPO)]))
    main_fd, child_fd = pty.openpty()
    # A new pseudo-terminal is 0 columns wide, and a bar fitted to it is empty: give it 24x100.
    fcntl.ioctl(child_fd, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))
    chunks: list[bytes] = []

    def drain() -> None:  # keep reading so a full pseudo-terminal never blocks the child
        while True:
            try:
                data = os.read(main_fd, 4096)
            except OSError:  # EIO once the child's side is closed
                return
            if not data:
                return
            chunks.append(data)

    reader = threading.Thread(target=drain, daemon=True)
    reader.start()
    try:
        proc = subprocess.run(
            [sys.executable, "-m", "api.cli", *map(str, args)],
            stdout=subprocess.DEVNULL,
            stderr=child_fd,
            env=env,
            cwd=REPO,
            timeout=300,
        )
    finally:
        os.close(child_fd)
    reader.join(timeout=30)
    os.close(main_fd)
    return proc.returncode, b"".join(chunks).decode("utf-8", "replace")


@pytest.mark.slow
def test_fitting_progress_shows_on_a_terminal_only(world: World, tmp_path: Path) -> None:
    args = ("train", "--index", world.index.path, "--log", world.train_log, "--calibration", "none")
    # Into a pipe (a log file, CI): no bars redrawn with carriage returns.
    out = hunchwise(*args, "--out", tmp_path / "piped.json")
    assert out.returncode == 0, out.stderr
    assert "fitting" not in out.stderr and "\r" not in out.stderr
    # On a terminal: the model fitting has its own bar (cross-validation folds, final fit).
    code, err = _stderr_on_a_terminal(*args, "--out", tmp_path / "tty.json")
    assert code == 0, err
    assert "fitting" in err and "fits" in err


@pytest.mark.slow
def test_a_file_where_a_folder_belongs_and_the_reverse(world: World, tmp_path: Path) -> None:
    model = tmp_path / "model.json"
    ok = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", model,
        "--features", "bm25_score", "--calibration", "none", "--json",
    )  # fmt: skip
    assert ok.returncode == 0, ok.stderr
    # A report is a folder: a file of that name is said to be one, and left as it was.
    taken = tmp_path / "notes.txt"
    taken.write_text("keep me\n")
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log, "--model", model,
        "--report", taken, "--no-ablation",
    )  # fmt: skip
    assert out.returncode != 0 and out.stderr.count("\n") == 1
    assert f"{taken} is a file, not a folder" in out.stderr and "Errno" not in out.stderr
    assert taken.read_text() == "keep me\n"
    # A model is a file: a folder given as the model is said to be one.
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log,
        "--model", tmp_path, "--report", tmp_path / "report", "--no-ablation",
    )  # fmt: skip
    assert out.returncode != 0 and out.stderr.count("\n") == 1
    assert f"{tmp_path} is a folder, not a model file" in out.stderr
    assert "Errno" not in out.stderr


@pytest.mark.slow
def test_warnings_go_to_stderr_when_the_model_loses_to_a_baseline(
    world: World, tmp_path: Path
) -> None:
    from tests.reranker.test_evaluate import reversed_score_model

    # Popularity alone knows nothing of the clue: held out, it loses to the BM25 order.
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log,
        "--out", tmp_path / "pop.json", "--features", "popularity",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    lost = "hunchwise: warning: the model (on held-out folds of its training clues) loses to "
    assert (
        lost + "the baseline 'retrieval score alone (BM25 order)' on top-1 accuracy" in out.stderr
    )
    assert "hunchwise: warning" not in out.stdout

    model = reversed_score_model(world, tmp_path)
    out = hunchwise(
        "evaluate", "--index", world.index.path, "--log", world.test_log, "--model", model,
        "--report", tmp_path / "rep", "--no-ablation", "--json",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    metrics = json.loads(out.stdout)["metrics"]  # stdout stays clean JSON
    lines = out.stderr.splitlines()
    assert lines == [f"hunchwise: warning: {w['message']}" for w in metrics["warnings"]]
    assert any(
        "loses to the baseline 'retrieval score alone' on top-1 accuracy" in s for s in lines
    )


@pytest.mark.slow
def test_train_refines_the_vectors_unless_told_not_to(world: World, tmp_path: Path) -> None:
    plain = tmp_path / "plain.json"
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", plain,
        "--no-refine-vectors",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    art = json.loads(plain.read_text())
    assert art["candidates"]["mode"] == "hybrid" and art["candidates"]["vectors"] == ""
    assert art["training"]["refined_vectors"] is None
    assert "refined vectors" not in out.stdout
    refined = tmp_path / "refined.json"
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", refined
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    name = json.loads(refined.read_text())["candidates"]["vectors"]
    assert f"refined vectors {name}" in out.stdout
    assert (world.index.path / f"vectors-{name}" / "docvec.npy").exists()
    # Refining trains with the index's own settings, the epochs the build chose included.
    gen = json.loads((world.index.path / f"vectors-{name}" / "generation.json").read_text())
    assert gen["vectors"]["settings"] == world.index.manifest["vectors"]["settings"]


@pytest.mark.slow
def test_train_over_the_fit_budget_fits_in_blocks(world: World, tmp_path: Path) -> None:
    model = tmp_path / "model.json"
    out = hunchwise(
        "train", "--index", world.index.path, "--log", world.train_log, "--out", model,
        "--fit-budget", "1K", "--json",
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    fit = json.loads(model.read_text())["fit"]
    assert fit["method"] == "blocks" and fit["budget_bytes"] == 1024
    assert fit["table_bytes"] > 1024 and "exceed the memory budget" in fit["reason"]
    assert json.loads(out.stdout)["fit"] == f"blocks: {fit['reason']}"


def test_fit_budget_sizes() -> None:
    assert [byte_size(t) for t in ("100", "2K", "1.5M", "2G", "1GiB", "3gb")] == [
        100,
        2048,
        1536 * 1024,
        2 * 1024**3,
        1024**3,
        3 * 1024**3,
    ]
    for bad in ("lots", "0", "-1M", "2X", ""):
        with pytest.raises(argparse.ArgumentTypeError, match="expected a size"):
            byte_size(bad)
