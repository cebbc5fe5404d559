"""`hunchwise index tune`, run as the real console script on the demo corpus."""

from __future__ import annotations

import json
import shlex
import shutil
import subprocess
from pathlib import Path

import pytest

from retriever import build_index, load_index
from tests.reranker.conftest import COMMITTED_DEMO, write_jsonl

EXE = shutil.which("hunchwise")
SMALL_GRID = ["--k1", "0.4,1.5", "--b", "0.3:0.9:0.3", "--idf", "okapi", "-k", "5"]


def run(*args: str) -> subprocess.CompletedProcess[str]:
    """Run the installed `hunchwise` script."""
    assert EXE is not None, "the hunchwise console script is not installed (pip install -e .)"
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The demo articles, the first 300 labelled train clues, and an index built by the CLI."""
    folder = tmp_path_factory.mktemp("tune_cli")
    articles = folder / "articles.jsonl"
    shutil.copy(COMMITTED_DEMO / "articles.jsonl", articles)
    lines = (COMMITTED_DEMO / "questions_train.jsonl").read_text().splitlines()[:300]
    labels = folder / "labels.jsonl"
    labels.write_text("\n".join(lines) + "\n")
    res = run("index", "build", str(articles), "--out", str(folder / "idx"), "--no-vectors")
    assert res.returncode == 0, res.stderr
    return {"articles": articles, "labels": labels, "index": folder / "idx", "dir": folder}


@pytest.mark.slow
def test_table_json_and_the_printed_rebuild_command(demo: dict[str, Path]) -> None:
    out = demo["dir"] / "grid.json"
    res = run(
        "index", "tune", "--index", str(demo["index"]), "--log", str(demo["labels"]),
        *SMALL_GRID, "--write", str(out),
    )  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert "300 labelled clues" in res.stdout and "split by answer" in res.stdout
    assert res.stdout.count("<- chosen") == 1
    saved = json.loads(out.read_text())
    assert len(saved["rows"]) == 6 and saved["k"] == 5
    chosen = next(r for r in saved["rows"] if r["chosen"])
    assert chosen["recall_at_k"] == max(r["recall_at_k"] for r in saved["rows"])
    assert f"recall@5 {chosen['recall_at_k']:.3f}" in res.stdout  # rounded for people
    line = res.stdout.split("rebuild with:\n", 1)[1].strip()
    assert line == saved["rebuild"] and line.startswith("hunchwise index build ")
    argv = shlex.split(line)
    rebuilt = run(*argv[1:])  # the printed line, as a person would paste it
    assert rebuilt.returncode == 0, rebuilt.stderr
    bm25 = load_index(demo["index"]).manifest["bm25"]
    assert (bm25["k1"], bm25["b"], bm25["idf"]) == (chosen["k1"], chosen["b"], chosen["idf"])
    assert "vectors" not in load_index(demo["index"]).manifest  # --no-vectors carried over
    # Tuned again, the index's own parameters are now the chosen ones.
    again = run(
        "index", "tune", "--index", str(demo["index"]), "--log", str(demo["labels"]),
        *SMALL_GRID, "--json",
    )  # fmt: skip
    row = next(r for r in json.loads(again.stdout)["rows"] if r["current"])
    assert row["recall_at_k"] == chosen["recall_at_k"]


def test_unknown_answers_are_counted_and_named(demo: dict[str, Path], tmp_path: Path) -> None:
    lines = demo["labels"].read_text().splitlines()[:40]
    bad = [{"clue": "a ship of no sea", "answer": f"zz{i}"} for i in range(3)]
    labels = write_jsonl(tmp_path / "mixed.jsonl", [*lines, *bad])
    res = run(
        "index", "tune", "--index", str(demo["index"]), "--log", str(labels),
        "--k1", "1.2", "--b", "0.75",
    )  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert f"3 answers name no article of this index, skipped: {labels}:41 'zz0'" in res.stdout


def test_index_without_a_recorded_corpus_gets_a_placeholder(
    demo: dict[str, Path], tmp_path: Path
) -> None:
    records = [json.loads(x) for x in demo["articles"].read_text().splitlines()]
    build_index(records, tmp_path / "idx", vectors=False)  # from records: no corpus file
    res = run(
        "index", "tune", "--index", str(tmp_path / "idx"), "--log", str(demo["labels"]),
        "--k1", "1.2", "--b", "0.75",
    )  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert "CORPUS_FILE" in res.stdout and "pass --corpus" in res.stdout
    given = run(
        "index", "tune", "--index", str(tmp_path / "idx"), "--log", str(demo["labels"]),
        "--k1", "1.2", "--b", "0.75", "--corpus", str(demo["articles"]), "--json",
    )  # fmt: skip
    assert json.loads(given.stdout)["rebuild"].startswith(
        f"hunchwise index build {demo['articles']} --out"
    )


@pytest.mark.parametrize(
    ("extra", "needle"),
    [
        (["--log", "{missing}"], "file not found"),
        (["--log", "{unknown}"], "only 0 labelled clues name an article"),
        (["--log", "{labels}", "--k1", ""], "the grid would be empty"),
        (["--log", "{labels}", "--idf", " , "], "the grid would be empty"),
        (["--log", "{labels}", "--b", "0.5,1.5"], "b must be between 0 and 1, got 1.5"),
        (["--log", "{labels}", "--k1", "0.4:2.0"], "expected numbers like"),
        (["--log", "{labels}", "-k", "0"], "-k must be at least 1"),
    ],
)
def test_errors_are_one_line_and_non_zero(
    demo: dict[str, Path], tmp_path: Path, extra: list[str], needle: str
) -> None:
    unknown = write_jsonl(
        tmp_path / "unknown.jsonl", [{"clue": "x y", "answer": f"nobody{i}"} for i in range(5)]
    )
    paths = {"missing": tmp_path / "none.jsonl", "unknown": unknown, "labels": demo["labels"]}
    args = [a.format(**paths) for a in extra]
    res = run("index", "tune", "--index", str(demo["index"]), *args)
    assert res.returncode != 0
    assert needle in res.stderr, res.stderr
    if needle == "file not found":
        assert str(paths["missing"]) in res.stderr
