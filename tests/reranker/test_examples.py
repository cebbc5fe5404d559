"""Prefix plans and the training table: one labelled row per (clue prefix, candidate)."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from reranker import default_registry
from reranker.training import PrefixPlan, build_table, read_logs
from retriever import Index

Writer = Callable[[Path, Iterable[Any]], Path]


@pytest.mark.parametrize(
    ("plan", "n_words", "cuts"),
    [
        # every 20% of the words, rounded up: ceil(0.2*10)=2, 4, 6, 8, 10
        (PrefixPlan(), 10, [2, 4, 6, 8, 10]),
        # ceil(1.4)=2, ceil(2.8)=3, ceil(4.2)=5, ceil(5.6)=6, 7
        (PrefixPlan(), 7, [2, 3, 5, 6, 7]),
        # short clues collapse to distinct cuts: ceil(0.4)=1, ceil(0.8)=1, 2, 2, 2
        (PrefixPlan(), 2, [1, 2]),
        (PrefixPlan(), 1, [1]),
        (PrefixPlan(), 0, []),
        # 28% of 25 words is exactly 7, although 0.28 * 25 == 7.000000000000001 in floats
        (PrefixPlan(fractions=(0.28, 0.56)), 25, [7, 14, 25]),
        (PrefixPlan(fractions=(0.5,)), 9, [5, 9]),  # the whole clue is always the last cut
        # every N words: 3, 6, 9 and the whole clue
        (PrefixPlan(every_words=3), 10, [3, 6, 9, 10]),
        (PrefixPlan(every_words=3), 9, [3, 6, 9]),
        (PrefixPlan(every_words=1), 4, [1, 2, 3, 4]),
        (PrefixPlan(every_words=5), 3, [3]),
    ],
)
def test_prefix_cuts(plan: PrefixPlan, n_words: int, cuts: list[int]) -> None:
    assert plan.cuts(n_words) == cuts


def test_prefix_cuts_match_the_rounded_up_share_for_all_small_cases() -> None:
    # The cut for share f is the least m with m / n >= f, found here by counting, not ceil().
    for pct in range(1, 101):
        f = pct / 100
        plan = PrefixPlan(fractions=(f,))
        for n in range(1, 60):
            least = next(m for m in range(1, n + 1) if m * 100 >= pct * n)
            assert plan.cuts(n) == sorted({least, n}), (f, n)


@pytest.mark.parametrize(
    ("plan", "n_words", "labels"),
    [
        # fraction plans label a cut with the smallest planned share that gives it
        (PrefixPlan(), 10, [0.2, 0.4, 0.6, 0.8, 1.0]),
        (PrefixPlan(), 2, [0.2, 1.0]),  # 0.2 and 0.4 of 2 words both keep 1 word
        (PrefixPlan(fractions=(0.28, 0.56)), 25, [0.28, 0.56, 1.0]),
        # every-N plans round the true share up to a tenth: 3/7 -> 0.5, 6/7 -> 0.9
        (PrefixPlan(every_words=3), 7, [0.5, 0.9, 1.0]),
        (PrefixPlan(every_words=3), 10, [0.3, 0.6, 0.9, 1.0]),
    ],
)
def test_prefix_labels(plan: PrefixPlan, n_words: int, labels: list[float]) -> None:
    assert [plan.label(m, n_words) for m in plan.cuts(n_words)] == labels


@pytest.mark.parametrize(
    "kwargs", [{"fractions": (0.0,)}, {"fractions": (1.5,)}, {"every_words": 0}]
)
def test_prefix_plan_validation(kwargs: dict[str, Any]) -> None:
    with pytest.raises(ValueError, match="must"):
        PrefixPlan(**kwargs)


CLUES = [
    {"clue": "Which grey river town near Pellomir has stone", "answer": "a3"},
    {"clue": "small river with stone bridges", "answer": "Varn Stone (town)"},
]


def test_every_prefix_is_searched_and_labelled_candidate_by_candidate(
    tiny_index: Index, tmp_path: Path, jsonl: Writer
) -> None:
    log = jsonl(tmp_path / "log.jsonl", CLUES)
    reg = default_registry()
    plan = PrefixPlan(fractions=(0.25, 0.5, 1.0))
    table = build_table(tiny_index, read_logs([log]), reg, reg.names, k=3, plan=plan)
    assert table.n_clues == 2
    expected_rows = 0
    group = 0
    for cid, rec in enumerate(CLUES):
        words = rec["clue"].split()
        gold = tiny_index.row_of(tiny_index.resolve(rec["answer"]) or "")
        # The fraction column is the plan's share each cut stands for (8 and 5 words: the cuts
        # keep 2, 4, 8 and 2, 3, 5 words), so prefixes of different clues group together.
        cuts = plan.cuts(len(words))
        assert len(cuts) == 3
        for m, label in zip(cuts, [0.25, 0.5, 1.0], strict=True):
            prefix = " ".join(words[:m])
            hits = tiny_index.search(prefix, k=3)  # reference: searching the prefix directly
            sel = table.group == group
            assert table.row[sel].tolist() == [h.row for h in hits], prefix
            assert table.score[sel].tolist() == [h.score for h in hits]
            assert table.rank[sel].tolist() == [h.rank for h in hits]
            assert table.y[sel].tolist() == [int(h.row == gold) for h in hits]
            assert np.all(table.clue_id[sel] == cid)
            assert np.all(table.fraction[sel] == label)
            expected_rows += len(hits)
            group += 1
    assert table.n_prefixes == group == 3 + 3
    assert table.X.shape == (expected_rows, len(reg.names)) == (table.y.size, table.X.shape[1])
    assert table.feature_names == reg.names
    # the full-clue prefixes hold the answer in both clues
    assert table.recall() == 1.0
    frame = table.to_frame()
    assert list(frame.columns[: len(reg.names)]) == reg.names
    assert frame["_y"].tolist() == table.y.tolist()
    np.testing.assert_array_equal(table.columns(["inlinks"])[:, 0], tiny_index.inlinks[table.row])
    with pytest.raises(ValueError, match="no_such"):
        table.columns(["no_such"])


def test_recall_counts_full_clues_whose_answer_is_missed(
    tiny_index: Index, tmp_path: Path, jsonl: Writer
) -> None:
    # "kesvin" retrieves only Kesvin (river); the answer Pellomir is not a candidate.
    log = jsonl(tmp_path / "log.jsonl", [*CLUES, {"clue": "kesvin", "answer": "Pellomir"}])
    table = build_table(tiny_index, read_logs([log]), default_registry(), ["bm25_score"], k=5)
    assert table.recall() == pytest.approx(2 / 3)
    assert table.y[table.clue_id == 2].sum() == 0


def test_no_clues_gives_an_empty_table(tiny_index: Index) -> None:
    table = build_table(tiny_index, [], default_registry(), ["bm25_score", "inlinks"])
    assert table.X.shape == (0, 2) and table.y.size == 0 and table.n_clues == 0
    assert table.recall() == 0.0
