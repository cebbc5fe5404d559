"""Training with the table's rows left on a local Ray cluster: the out-of-core fit against the
gathered one, and proof that the driver did not gather the table.

One two-CPU Ray cluster for the module; the demo's train log on a BM25 index of the demo
articles (BM25 candidates: no word vectors, so both trainings see the same rows).
"""

from __future__ import annotations

import itertools
import tracemalloc
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression
from sklearn.preprocessing import StandardScaler

from reranker.errors import TrainingError
from reranker.training import TrainResult, train
from reranker.training.blockfit import choose_fit
from reranker.training.estimator import Reranker
from reranker.training.outofcore import TableFacts, fit_out_of_core, table_facts
from reranker.training.prefixrows import Prefixes
from retriever import Index, build_index
from retriever.cluster import Runner

pytestmark = pytest.mark.slow

SAMPLE = 3000  # rows the out-of-core training may gather


@pytest.fixture(scope="module")
def runner() -> Iterator[Runner]:
    """A two-CPU local Ray cluster for the module, through the project's runner."""
    ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    yield Runner("local")
    ray.shutdown()


@pytest.fixture(scope="module")
def bm25_index(demo_dir: Path, tmp_path_factory: pytest.TempPathFactory) -> Index:
    return build_index(demo_dir / "articles.jsonl", tmp_path_factory.mktemp("idx"), vectors=False)


def _traced(fn: Any) -> tuple[Any, int]:
    """fn() and the peak of the Python allocations it made (tracemalloc, which numpy's
    arrays report to)."""
    tracemalloc.start()
    try:
        return fn(), tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.fixture(scope="module")
def both(
    runner: Runner, bm25_index: Index, demo_dir: Path, tmp_path_factory: pytest.TempPathFactory
) -> dict[str, Any]:
    """The same training gathered (fit='memory') and out of core (a budget the table
    exceeds), each with its driver's peak of traced allocations."""
    out = tmp_path_factory.mktemp("models")
    log = [demo_dir / "questions_train.jsonl"]
    common = {"candidates": "bm25", "runner": runner}
    # First: the gathered training also imports everything both need, so the second peak
    # is of the training alone.
    gathered, peak_g = _traced(
        lambda: train(bm25_index, log, out / "g.json", fit="memory", **common)
    )
    rows, width = gathered.table.X.shape
    budget = rows * width * 8 // 4
    ooc, peak_o = _traced(
        lambda: train(
            bm25_index, log, out / "o.json", fit_budget=budget, sample_rows=SAMPLE, **common
        )
    )
    return {"gathered": gathered, "ooc": ooc, "peaks": (peak_g, peak_o), "budget": budget}


def test_the_driver_does_not_gather_the_table(both: dict[str, Any]) -> None:
    gathered: TrainResult = both["gathered"]
    ooc: TrainResult = both["ooc"]
    rows, width = gathered.table.X.shape
    table_bytes = rows * width * 8
    fit = ooc.artifact["fit"]
    assert fit["method"] == "blocks" and fit["budget_bytes"] == both["budget"]
    assert fit["engine"] == "blocks on the cluster" and fit["blocks"] > 1
    # The model file's facts: every row was counted, only the sample's reached the driver.
    assert fit["rows"] == rows == ooc.artifact["training"]["rows"]
    assert 0 < fit["driver_rows"] == ooc.table.y.size <= SAMPLE < rows
    assert fit["sample"]["rows"] == fit["driver_rows"] and fit["sample"]["of_rows"] == rows
    assert f"of {fit['sample']['of_clues']:,} clues" in fit["reason"]  # the CLI's summary line
    # And the allocator's: the gathered training's driver held at least the table's features
    # at its peak; the out-of-core one never allocated that much in all.
    peak_g, peak_o = both["peaks"]
    assert peak_g >= table_bytes > peak_o, (peak_g, table_bytes, peak_o)


def test_counts_over_every_row_equal_the_gathered_table(both: dict[str, Any]) -> None:
    g, o = both["gathered"].artifact["training"], both["ooc"].artifact["training"]
    for key in ("clues", "prefixes", "rows", "positives", "recall_at_k_full_clue"):
        assert o[key] == g[key], key


def test_out_of_core_fit_equals_scikit_learn(both: dict[str, Any]) -> None:
    t = both["gathered"].table
    ooc: TrainResult = both["ooc"]
    est = ooc.estimator
    assert est.C_ == both["gathered"].estimator.C_
    for C, loss in both["gathered"].estimator.cv_log_loss_.items():
        # Reference: the gathered training's scikit-learn cross-validation (tol 1e-6: its fold
        # models stop short of the optimum, their held-out losses 1.3e-6 apart here).
        assert est.cv_log_loss_[C] == pytest.approx(loss, rel=1e-5)
    # Reference: scikit-learn's StandardScaler and LogisticRegression (newton-cholesky) on
    # the gathered table at the chosen C, solved tightly (tol 1e-10) as in test_fitchoice.
    scaler = StandardScaler().fit(t.X)
    assert np.allclose(est.mean_, scaler.mean_, rtol=1e-12, atol=1e-12)
    assert np.allclose(est.scale_, scaler.scale_, rtol=1e-10)
    want = LogisticRegression(C=est.C_, solver="newton-cholesky", tol=1e-10, max_iter=5000)
    want.fit(scaler.transform(t.X), t.y)
    big = float(np.max(np.abs(want.coef_[0])))
    assert np.max(np.abs(est.coef_ - want.coef_[0])) <= 1e-5 * big
    assert abs(est.intercept_ - want.intercept_[0]) <= 1e-5 * big
    p = est.raw_probability(t.X)
    assert np.max(np.abs(p - want.predict_proba(scaler.transform(t.X))[:, 1])) <= 1e-8


def test_a_sample_of_every_clue_gives_the_gathered_calibration(both: dict[str, Any]) -> None:
    """fit_out_of_core over in-process blocks of part of the table, the sample cap above its
    rows: calibrator and held-out probabilities as the gathered block fit's."""
    t = both["gathered"].table
    keep = t.clue_id < 250
    cols = {c: getattr(t, c)[keep] for c in ("X", "y", "group", "clue_id", "fraction")}
    cols |= {c: getattr(t, c)[keep] for c in ("score", "rank", "row", "words")}
    cuts = np.linspace(0, int(keep.sum()), 5).astype(int)
    blocks = [{c: v[a:b] for c, v in cols.items()} for a, b in itertools.pairwise(cuts)]
    here = Runner(None)
    facts: TableFacts = table_facts(here, blocks, 250)
    pre = Prefixes(t.texts, [], t.unresolved, 250, t.clues[:250])
    choice = choose_fit("blocks", facts.rows, t.X.shape[1])
    got = fit_out_of_core(here, blocks, pre, t.feature_names, choice, facts, sample_rows=10**6)
    want = Reranker(fit="blocks", block_rows=4000)
    want.fit(cols["X"], cols["y"], cols["clue_id"], t.feature_names)
    assert got.record["sample"]["rows"] == facts.rows == cols["y"].size
    assert got.estimator.C_ == want.C_
    assert got.estimator.calibrator_["method"] == want.calibrator_["method"]
    assert np.allclose(got.estimator.oof_proba_, want.oof_proba_, rtol=0, atol=1e-9)
    assert np.allclose(got.estimator.coef_, want.coef_, rtol=1e-9, atol=1e-12)


def test_the_sample_holds_whole_clues_within_its_cap(both: dict[str, Any]) -> None:
    gathered, ooc = both["gathered"].table, both["ooc"].table
    sample = both["ooc"].artifact["fit"]["sample"]
    assert sample["cap_rows"] == SAMPLE and 2 <= sample["clues"] < sample["of_clues"]
    assert ooc.y.size == sample["rows"] <= SAMPLE
    # Every sampled clue brings all of its rows: as many as it has in the whole table.
    clues, rows = np.unique(ooc.clue_id, return_counts=True)
    assert clues.size == sample["clues"]
    assert np.array_equal(rows, np.bincount(gathered.clue_id)[clues])


def test_a_cap_below_two_whole_clues_is_refused_saying_so(both: dict[str, Any]) -> None:
    t = both["gathered"].table
    blocks = [{c: getattr(t, c) for c in ("X", "y", "group", "clue_id", "fraction", "score",
                                           "rank", "row", "words")}]  # fmt: skip
    here = Runner(None)
    facts = table_facts(here, blocks, t.n_clues)
    pre = Prefixes(t.texts, [], t.unresolved, t.n_clues, t.clues)
    choice = choose_fit("blocks", facts.rows, t.X.shape[1])
    smallest = int(np.bincount(t.clue_id).min())
    with pytest.raises(TrainingError, match=r"holds [01] whole clue.*--sample-rows"):
        fit_out_of_core(here, blocks, pre, t.feature_names, choice, facts, sample_rows=smallest)
