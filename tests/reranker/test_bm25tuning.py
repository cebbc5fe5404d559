"""Choosing BM25's parameters from labelled clues: the grid, the split by answer, the choice."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from reranker.errors import TrainingError
from reranker.training import LabelledClue, read_logs
from reranker.training.bm25tuning import split_by_answer, tune_bm25
from retriever import Index, build_index

GRID = {"k1s": (0.4, 1.5), "bs": (0.3, 0.75, 1.0), "idfs": ("okapi", "lucene")}


@pytest.fixture(scope="module")
def plain_demo_index(demo_dir: Path, tmp_path_factory: pytest.TempPathFactory) -> Index:
    """The demo articles indexed with the default parameters, without word vectors."""
    return build_index(
        demo_dir / "articles.jsonl", tmp_path_factory.mktemp("tune") / "idx", vectors=False
    )


@pytest.fixture(scope="module")
def demo_clues(demo_dir: Path) -> list[LabelledClue]:
    """The demo's labelled train split."""
    return read_logs([demo_dir / "questions_train.jsonl"])


def test_chosen_point_has_the_best_held_out_recall(
    plain_demo_index: Index, demo_clues: list[LabelledClue], tmp_path: Path, demo_dir: Path
) -> None:
    t = tune_bm25(plain_demo_index, demo_clues, k=5, seed=3, **GRID)
    assert len(t.rows) == 12 and sum(r["chosen"] for r in t.rows) == 1
    best = max(t.rows, key=lambda r: (r["recall_at_k"], r["mrr"]))
    chosen = next(r for r in t.rows if r["chosen"])
    assert (chosen["recall_at_k"], chosen["mrr"]) == (best["recall_at_k"], best["mrr"])
    assert (t.chosen.k1, t.chosen.b, t.chosen.idf) == (chosen["k1"], chosen["b"], chosen["idf"])
    # The grid is not flat on this corpus, so the choice means something.
    assert len({r["recall_at_k"] for r in t.rows}) > 1
    assert t.current["k1"] == 1.5 and t.current["b"] == 0.75 and t.current["current"]
    assert t.n_tuning + t.n_held_out == t.n_clues == len(demo_clues) - len(t.unresolved)

    # Reference: the project's own search on an index freshly built from the corpus with the
    # chosen parameters (no in-memory re-weighting), over the same held-out clues.
    rows = [plain_demo_index.resolver.row(str(c.answer)) for c in demo_clues]
    used = [c for c, r in zip(demo_clues, rows, strict=True) if r is not None]
    golds = np.array([r for r in rows if r is not None])
    _, held = split_by_answer(golds, 3)
    fresh = build_index(
        demo_dir / "articles.jsonl",
        tmp_path / "fresh",
        vectors=False,
        k1=t.chosen.k1,
        b=t.chosen.b,
        idf=t.chosen.idf,
    )
    hits = fresh.search_many([used[i].clue for i in held], k=5)
    ranks = [
        next((h.rank for h in hs if h.row == golds[i]), 0)
        for i, hs in zip(held.tolist(), hits, strict=True)
    ]
    found = np.array(ranks) > 0
    assert chosen["recall_at_k"] == pytest.approx(found.mean(), abs=1e-12)
    mrr = np.mean([1 / r if r else 0.0 for r in ranks])
    assert chosen["mrr"] == pytest.approx(mrr, abs=1e-12)


def test_split_keeps_each_answer_on_one_side_and_follows_the_seed() -> None:
    golds = np.repeat(np.arange(40), 3)  # 40 answers, three clues each
    tuning, held = split_by_answer(golds, 0)
    assert not set(golds[tuning]) & set(golds[held])
    assert sorted(np.concatenate([tuning, held]).tolist()) == list(range(golds.size))
    assert 15 <= np.unique(golds[held]).size <= 25
    again, _ = split_by_answer(golds, 0)
    other, _ = split_by_answer(golds, 1)
    assert np.array_equal(tuning, again) and not np.array_equal(tuning, other)


def test_unknown_answers_and_none_of_these_are_counted(
    plain_demo_index: Index, demo_clues: list[LabelledClue]
) -> None:
    extra = [
        LabelledClue("a ship that sailed nowhere", "a999999", {}, "x.jsonl", 1),
        LabelledClue("a river of no land", "No Such River", {}, "x.jsonl", 2),
        LabelledClue("none of the articles", None, {}, "x.jsonl", 3),
    ]
    t = tune_bm25(plain_demo_index, [*demo_clues[:60], *extra], k1s=(1.0,), bs=(0.5,))
    assert [u["answer"] for u in t.unresolved] == ["a999999", "No Such River"]
    assert t.unresolved[0]["line"] == 1 and t.no_answer == 1 and t.n_clues == 60
    assert t.to_dict()["clues"]["unresolved"] == 2


def test_too_few_clues_and_an_empty_grid_are_refused(
    plain_demo_index: Index, demo_clues: list[LabelledClue]
) -> None:
    unknown = [LabelledClue("x y z", "nobody", {}, "x.jsonl", i) for i in range(10)]
    with pytest.raises(TrainingError, match="only 0 labelled clues name an article"):
        tune_bm25(plain_demo_index, unknown)
    with pytest.raises(ValueError, match="the grid is empty"):
        tune_bm25(plain_demo_index, demo_clues, k1s=())
    with pytest.raises(ValueError, match="b must be between 0 and 1"):
        tune_bm25(plain_demo_index, demo_clues, bs=(1.5,))
