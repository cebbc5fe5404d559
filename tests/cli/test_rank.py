"""`hunchwise rank`: the real console script against the service's replies for the same clues."""

from __future__ import annotations

import contextlib
import csv
import json
import math
import shutil
import subprocess
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from tests.api.conftest import demo, index_dir, make_client, model_path, test_questions
from tests.api.svc_helpers import TestClient

__all__ = ["demo", "index_dir", "make_client", "model_path", "test_questions"]  # fixtures

EXE = shutil.which("hunchwise")
N_CLUES = 8


def run(*args: str | Path) -> subprocess.CompletedProcess[str]:
    """Run the installed `hunchwise` script."""
    assert EXE is not None, "the hunchwise console script is not installed (pip install -e .)"
    return subprocess.run([EXE, *map(str, args)], capture_output=True, text=True, timeout=300)


@dataclass(frozen=True)
class DemoService:
    """The demo's index folder, model file and held-out questions, and clients of the
    service serving that index and model: what `hunchwise rank` is compared against."""

    index: Path
    model: Path
    questions: list[dict[str, Any]]
    client: Callable[..., contextlib.AbstractContextManager[TestClient]]


@pytest.fixture
def demo_service(
    index_dir: Path,
    model_path: Path,
    test_questions: list[dict[str, Any]],
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
) -> DemoService:
    return DemoService(index_dir, model_path, test_questions, make_client)


def clue_file(folder: Path, questions: list[dict[str, Any]], *fields: str) -> Path:
    """clues.jsonl in `folder`: these `fields` of each question, one JSON object a line."""
    path = folder / "clues.jsonl"
    path.write_text("".join(json.dumps({f: q[f] for f in fields}) + "\n" for q in questions))
    return path


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def check_explanation(cand: dict[str, Any]) -> None:
    """Contributions plus the intercept give the logit, and the logit gives the probability."""
    e = cand["explanation"]
    parts = e["features"]
    assert [abs(p["contribution"]) for p in parts] == sorted(
        (abs(p["contribution"]) for p in parts), reverse=True
    )
    values = cand.get("features")
    for p in parts:
        assert p["contribution"] == pytest.approx(p["coefficient"] * p["scaled"], abs=1e-12)
        if values:  # the explained values are the candidate's features
            assert p["value"] == values[p["name"]]
    assert e["intercept"] + math.fsum(p["contribution"] for p in parts) == pytest.approx(
        e["logit"], abs=1e-9
    )
    assert 1 / (1 + math.exp(-e["logit"])) == pytest.approx(e["raw_probability"], abs=1e-12)
    # The served pointwise probability follows from that logit (through the calibrator).
    assert e["pointwise"] == pytest.approx(cand["pointwise"], abs=1e-9)
    if e["calibration"] == "none":
        p = cand["pointwise"]
        assert math.log(p / (1 - p)) == pytest.approx(e["logit"], abs=1e-9)


@pytest.mark.slow
def test_rank_file_gives_the_services_probabilities(
    demo_service: DemoService, tmp_path: Path
) -> None:
    qs = demo_service.questions[:N_CLUES]
    jsonl = clue_file(tmp_path, qs, "id", "clue", "metadata")
    table = tmp_path / "clues.csv"
    with open(table, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "clue", "metadata"])
        w.writerows([q["id"], q["clue"], json.dumps(q["metadata"])] for q in qs)
    common = ["--index", demo_service.index, "--model", demo_service.model, "-k", "5"]
    common += ["--revealed", "0.6"]
    out = tmp_path / "ranked.jsonl"
    res = run("rank", *common, "--input", jsonl, "--output", out, "--explain")
    assert res.returncode == 0, res.stderr
    assert res.stdout == ""
    ranked = read_jsonl(out)
    assert [r["id"] for r in ranked] == [q["id"] for q in qs]

    from_csv = tmp_path / "ranked_csv.jsonl"
    res = run("rank", *common, "--input", table, "--output", from_csv, "--explain")
    assert res.returncode == 0, res.stderr
    assert read_jsonl(from_csv) == ranked

    with demo_service.client() as client:
        for q, mine in zip(qs, ranked, strict=True):
            body = {"clue": q["clue"], "metadata": q["metadata"], "k": 5, "revealed": 0.6}
            r = client.post("/v1/rank", json={**body, "explain": True, "include_features": True})
            assert r.status_code == 200, r.text
            served = r.json()
            assert len(mine["candidates"]) == len(served["candidates"]) == 5
            for a, b in zip(mine["candidates"], served["candidates"], strict=True):
                assert a["id"] == b["id"]
                assert a["probability"] == pytest.approx(b["probability"], rel=1e-12)
                assert a["pointwise"] == pytest.approx(b["pointwise"], rel=1e-12)
                assert a["explanation"]["logit"] == pytest.approx(
                    b["explanation"]["logit"], abs=1e-12
                )
                check_explanation(a)
                check_explanation(b)
            assert mine["in_candidates"] == pytest.approx(served["in_candidates"], rel=1e-12)
            assert mine["none_of_these"] == pytest.approx(served["none_of_these"], rel=1e-12)
            assert mine["decision"] == served["decision"]

    # One clue as an argument: the same result on stdout, without explanations unless asked.
    res = run("rank", *common, qs[0]["clue"])
    assert res.returncode == 0, res.stderr
    [single] = [json.loads(line) for line in res.stdout.splitlines()]
    assert [c["probability"] for c in single["candidates"]] == [
        c["probability"] for c in ranked[0]["candidates"]
    ]
    assert all(c["explanation"] is None for c in single["candidates"])


@pytest.mark.parametrize(
    ("name", "text", "expected"),
    [
        ("no_clue.csv", "id,text\n1,a mountain\n", "no_clue.csv, line 1, field 'clue'"),
        (
            "bad.jsonl",
            '{"clue": "a mountain"}\n{"clue": "a river"\n',
            "bad.jsonl, line 2: bad JSON",
        ),
        (
            "empty.jsonl",
            '{"clue": "a mountain"}\n\n{"clue": "  "}\n',
            "empty.jsonl, line 3, field 'clue': empty clue",
        ),
        ("empty.csv", 'clue,id\n"a river",x\n"",y\n', "empty.csv, line 3, field 'clue': empty"),
        (
            "meta.csv",
            'clue,metadata\n"a river","{not json"\n',
            "meta.csv, line 2, field 'metadata': bad JSON",
        ),
        ("twice.jsonl", '{"clue":"a","id":"x"}\n{"clue":"b","id":"x"}\n', "line 2, field 'id'"),
    ],
)
def test_rank_bad_input_names_file_line_and_field(
    tmp_path: Path, name: str, text: str, expected: str
) -> None:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    out = tmp_path / "out.jsonl"
    # The input is checked before the index and model are opened: these need not exist.
    res = run("rank", "--index", tmp_path / "idx", "--model", tmp_path / "m.json", "--input", path,
              "--output", out)  # fmt: skip
    assert res.returncode == 2
    assert expected in res.stderr and res.stderr.count("\n") == 1, res.stderr
    assert not out.exists()


@pytest.mark.slow
def test_rank_to_parquet_holds_the_jsonl_rows(
    index_dir: Path, model_path: Path, demo: dict[str, Path], tmp_path: Path
) -> None:
    pq = pytest.importorskip("pyarrow.parquet")
    common = ["--index", index_dir, "--model", model_path, "--input", demo["test"]]
    res = run("rank", *common, "--output", tmp_path / "out.parquet")
    assert res.returncode == 0, res.stderr
    res = run("rank", *common, "--output", tmp_path / "out.jsonl")
    assert res.returncode == 0, res.stderr
    table = pq.read_table(tmp_path / "out.parquet").to_pylist()
    lines = [json.loads(x) for x in (tmp_path / "out.jsonl").read_text().splitlines()]
    assert len(table) == len(lines) == len(demo["test"].read_text().splitlines())
    for row, line in zip(table, lines, strict=True):
        assert row["id"] == line["id"] and row["decision"] == line["decision"]
        got = [(c["id"], c["probability"]) for c in row["candidates"]]
        assert got == [(c["id"], c["probability"]) for c in line["candidates"]]
