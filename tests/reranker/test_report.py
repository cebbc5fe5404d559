"""Tests of reranker.training.report: real files on disk, parsed back with the standard library."""

from __future__ import annotations

import base64
import json
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.image as mpimg
import numpy as np
import pytest

from reranker.training.measures import (
    baseline_all_wrong,
    by_prefix,
    candidate_metrics,
    clue_metrics,
    reliability_table,
)
from reranker.training.report import summary_text, to_jsonable, write_report
from reranker.training.report_html import fmt, sig

from .test_report_browser import over_precise

EVIL = "<script>alert('x')</script>"


class _Collect(HTMLParser):
    """Section ids in document order and every <img>/<script>/<link> source (stdlib html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.sections: list[str] = []
        self.srcs: list[str] = []
        self.tags: set[str] = set()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.add(tag)
        a = dict(attrs)
        if tag == "section":
            self.sections.append(a.get("id") or "")
        for key in ("src", "href"):
            if a.get(key):
                self.srcs.append(str(a[key]))


def _inputs(seed: int = 0) -> dict[str, Any]:
    """A whole evaluation by reranker.training.measures on synthetic clues of 20 candidates."""
    rng = np.random.default_rng(seed)
    n_clues, per = 60, 20
    groups = np.repeat(np.arange(n_clues), per)
    y = np.zeros(n_clues * per, dtype=int)
    y[np.arange(n_clues) * per + rng.integers(0, per, n_clues)] = 1
    y[:per] = 0  # one clue whose answer is not among its candidates
    bm25 = rng.random(len(y)) + y * 0.5
    prob = np.clip(0.05 + 0.6 * y * rng.random(len(y)) + 0.1 * rng.random(len(y)), 0, 1)
    fractions = np.repeat(rng.choice([0.2, 0.6, 1.0], n_clues), per)
    top = np.zeros(len(y), dtype=bool)
    top[np.arange(n_clues) * per] = rng.random(n_clues) < 0.5
    bm25_prob = bm25 / bm25.max()
    metrics = {
        "clue": clue_metrics(groups, y, prob, bm25),
        "candidate": {
            "model": candidate_metrics(y, prob),
            "bm25_only": candidate_metrics(y, bm25_prob),
            "all_wrong": baseline_all_wrong(y),
        },
        "decision": {"threshold": np.float64(0.7), "policy": {"min_gap_" + EVIL: 0.1}},
        "data": {"n_train": np.int64(900), "corpus": "demo"},
    }
    ablation = [
        {"name": "bm25", "kind": "baseline", "features": ["bm25"], "log_loss": 0.3, "brier": 0.05,
         "roc_auc": 0.7, "top1": 0.4, "ece": 0.02},
        {"name": EVIL, "kind": "drop-one", "features": ["bm25", "x"], "log_loss": 0.25,
         "brier": 0.04, "roc_auc": None, "top1": 0.5, "ece": 0.01},
        {"name": "full", "kind": "full", "features": ["bm25", "x", "y"], "log_loss": 0.2,
         "brier": 0.03, "roc_auc": 0.9, "top1": 0.6, "ece": 0.01},
    ]  # fmt: skip
    return {
        "metrics": metrics,
        "reliability_candidate": reliability_table(y, prob),
        "reliability_top": metrics["clue"]["top_candidate_reliability"],
        "prefix_rows": by_prefix(fractions, groups, y, prob, top, {"reward": 1, "penalty": 2}),
        "ablation_rows": ablation,
        "inlinks": np.floor(rng.pareto(1.3, len(y)) * 4),
        "labels": y,
        "unresolved": [
            {"line": 12, "file": "clues.jsonl", "answer": EVIL},
            {"line": 40, "file": "clues.jsonl", "answer": "Nowhere Vale"},
        ],
    }


def _write(tmp_path: Path, **over: Any) -> tuple[dict[str, Path], dict[str, Any]]:
    args = {**_inputs(), **over}
    metrics = args.pop("metrics")
    return write_report(tmp_path / "out", metrics, title="eval " + EVIL, **args), metrics


def test_report_files_sections_and_embedded_images(tmp_path: Path) -> None:
    paths, _ = _write(tmp_path)
    expected_pngs = {"reliability_top", "reliability_candidate", "prefix", "ablation", "inlinks"}
    assert expected_pngs | {"metrics", "tables", "report"} == set(paths)
    for name in expected_pngs:
        img = mpimg.imread(paths[name])  # matplotlib decodes the PNG
        assert img.shape[0] >= 200 and img.shape[1] >= 200
    text = paths["report"].read_text(encoding="utf-8")
    parser = _Collect()
    parser.feed(text)
    # The page reads top-down: warnings and what was trained and evaluated first, then clue
    # level, candidate level, prefix, ablation, worst misses, in-links, unresolved answers;
    # extra metrics keys follow so nothing is lost.
    assert parser.sections == [
        "warnings",
        "about",
        "clue-level",
        "candidate-level",
        "by-prefix",
        "ablation",
        "worst-missed",
        "inlinks",
        "unresolved",
        "extra-decision",
        "extra-data",
    ]
    # Self-contained: every source is a PNG data URI that decodes to a real PNG.
    assert len(parser.srcs) == len(expected_pngs)
    for src in parser.srcs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"  # RFC 2083
    assert "http://" not in text and "https://" not in text
    assert "script" not in parser.tags and "link" not in parser.tags
    assert "95%" in text and "flatter" in text
    assert "Unresolved gold answers (2)" in text and "Nowhere Vale" in text
    assert "policy.min_gap_" in text and "n_train" in text  # unknown keys rendered generically
    assert not list(paths["report"].parent.glob(".*.tmp"))


def test_report_escapes_text(tmp_path: Path) -> None:
    paths, _ = _write(tmp_path)
    text = paths["report"].read_text(encoding="utf-8")
    assert "<script" not in text
    # html.escape form, in the title, the ablation table, the unresolved list and extra keys
    assert text.count("&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;") >= 4


def test_metrics_json_round_trips(tmp_path: Path) -> None:
    paths, metrics = _write(tmp_path)
    loaded = json.loads(paths["metrics"].read_text(encoding="utf-8"))
    assert loaded == to_jsonable(metrics)
    assert loaded["clue"]["recall_at_k"]["5"] == metrics["clue"]["recall_at_k"][5]
    assert loaded["data"]["n_train"] == 900 and loaded["decision"]["threshold"] == 0.7
    tables = json.loads(paths["tables"].read_text(encoding="utf-8"))
    assert tables["unresolved"][0]["answer"] == EVIL
    assert len(tables["prefix_rows"]) == 3


def test_to_jsonable_turns_nan_into_null() -> None:
    # JSON (RFC 8259 section 6) has no NaN or Infinity.
    assert to_jsonable({"a": float("nan"), 1: (np.float32(np.inf), np.arange(2))}) == {
        "a": None,
        "1": [None, [0, 1]],
    }


def test_report_without_optional_data(tmp_path: Path) -> None:
    paths, _ = _write(tmp_path, prefix_rows=[], ablation_rows=[], unresolved=[], inlinks=[])
    assert {"prefix", "ablation", "inlinks"}.isdisjoint(paths)
    text = paths["report"].read_text(encoding="utf-8")
    assert "Unresolved gold answers (0)" in text and "No rows." in text


def test_failed_write_keeps_previous_files(tmp_path: Path) -> None:
    paths, metrics = _write(tmp_path)
    before = paths["metrics"].read_bytes()
    bad = dict(metrics, data={"oops": object()})
    args = _inputs()
    args.pop("metrics")
    with pytest.raises(TypeError):
        write_report(tmp_path / "out", bad, **args)
    assert paths["metrics"].read_bytes() == before
    assert not list(paths["metrics"].parent.glob(".*.tmp"))


def test_summary_text(tmp_path: Path) -> None:
    args = _inputs()
    metrics = args["metrics"]
    text = summary_text(metrics, args["ablation_rows"])
    assert "clue level" in text and "candidate level" in text and "feature ablation" in text
    assert f"{metrics['clue']['top1_reranked']:.3g}" in text
    assert f"{metrics['candidate']['all_wrong']['accuracy']:.3g}" in text
    assert "recall@20" in text and "bm25_only" in text and "drop-one" in text
    assert "clue level" in summary_text({"clue": {}}, [])


class _Cells(HTMLParser):
    """The text of every table cell, and of every figure's caption (stdlib html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.cells: list[str] = []
        self.captions: list[str] = []
        self.images_in_figures = self.images = 0
        self._into: list[str] | None = None
        self._figure = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in ("td", "figcaption"):
            self._into = self.cells if tag == "td" else self.captions
            self._into.append("")
        self._figure = self._figure or tag == "figure"
        if tag == "img":
            self.images += 1
            self.images_in_figures += self._figure

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "figcaption"):
            self._into = None
        if tag == "figure":
            self._figure = False

    def handle_data(self, data: str) -> None:
        if self._into is not None:
            self._into[-1] += data


def test_numbers_for_people_have_three_significant_digits(tmp_path: Path) -> None:
    paths, metrics = _write(tmp_path)
    page = _Cells()
    page.feed(paths["report"].read_text(encoding="utf-8"))
    assert len(page.cells) > 50
    assert over_precise(page.cells) == []
    # metrics.json keeps every digit: the value shown is the stored one, rounded.
    stored = json.loads(paths["metrics"].read_text(encoding="utf-8"))
    mrr = stored["clue"]["mrr_reranked"]
    assert mrr == metrics["clue"]["mrr_reranked"] and len(repr(mrr)) > 8
    assert sig(mrr) in page.cells and repr(mrr) not in page.cells


@pytest.mark.parametrize(
    ("value", "shown"),
    [
        (0.95, "0.950"),
        (0.95349, "0.953"),
        (12345.6, "12300"),
        (0.00123456, "0.00123"),
        (6.16e-16, "6.16e-16"),
        (-1.23456, "-1.23"),
        (99.96, "100"),
        (0.0, "0"),
        (900, "900"),  # counts stay whole
        (float("nan"), "n/a"),
        ({"a": [0.123456, 2]}, '{"a": [0.123, 2]}'),
    ],
)
def test_fmt_rounds_to_three_significant_digits(value: Any, shown: str) -> None:
    assert fmt(value) == shown


def test_every_chart_has_a_caption_saying_how_to_read_it(tmp_path: Path) -> None:
    paths, _ = _write(tmp_path)
    page = _Cells()
    page.feed(paths["report"].read_text(encoding="utf-8"))
    assert page.images == page.images_in_figures == len(page.captions) == 5
    for caption in page.captions:
        assert len(caption.split()) >= 25, caption
        assert "better" in caption or "calibrated" in caption or "tells them apart" in caption
