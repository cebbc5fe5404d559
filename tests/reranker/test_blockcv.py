"""The grouped cross-validated fit over blocks of rows against the gathered fit, in process."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn.model_selection import GroupKFold

from reranker.training.blockcv import clue_folds, cross_validated_fit
from reranker.training.estimator import Reranker
from retriever.cluster import Runner


def grouped(n_clues: int = 150, seed: int = 4) -> dict[str, np.ndarray]:
    """Invented candidate rows: clues of 3 to 12 candidates, one right answer each, features of
    very different scales (one constant)."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(3, 13, n_clues)
    clue = np.repeat(np.arange(n_clues), sizes)
    X = rng.normal(size=(clue.size, 4)) * [1.0, 20.0, 0.1, 1.0] + [0.0, 3.0, 0.0, 0.0]
    X = np.hstack([X, np.full((clue.size, 1), 7.0)])
    y = np.zeros(clue.size, dtype=np.int8)
    noisy = X[:, 0] - 0.05 * X[:, 1] + rng.normal(size=clue.size)
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    for s, n in zip(starts, sizes, strict=True):
        y[s + int(np.argmax(noisy[s : s + n]))] = 1
    return {"X": X, "y": y, "clue_id": clue}


def blocks_of(table: dict[str, np.ndarray], cuts: list[int]) -> list[dict[str, np.ndarray]]:
    """The table cut into blocks at row positions (a clue may be cut across two blocks)."""
    edges = [0, *cuts, table["y"].size]
    return [{c: v[a:b] for c, v in table.items()} for a, b in itertools.pairwise(edges)]


def test_clue_folds_are_group_k_folds() -> None:
    # Reference: scikit-learn's GroupKFold (no shuffle) on the rows themselves.
    t = grouped()
    sizes = np.bincount(t["clue_id"])
    mine = clue_folds(sizes, 5)[t["clue_id"]]
    for f, (_, test) in enumerate(GroupKFold(n_splits=5).split(t["X"], t["y"], t["clue_id"])):
        assert np.array_equal(np.flatnonzero(mine == f), test)


def _fold_of(t: dict[str, np.ndarray]) -> np.ndarray:
    return clue_folds(np.bincount(t["clue_id"]), 5)


def test_blocks_equal_the_gathered_fits() -> None:
    t = grouped()
    names = ["a", "b", "c", "d", "const"]
    cv = cross_validated_fit(
        Runner(None), blocks_of(t, [100, 101, 640]), _fold_of(t), 5, (0.1, 1.0, 10.0)
    )
    # The gathered block fit runs the same Newton steps over other blocks: equal to rounding.
    same = Reranker(Cs=(0.1, 1.0, 10.0), fit="blocks", block_rows=333)
    same.fit(t["X"], t["y"], t["clue_id"], names)
    assert cv.C == same.C_
    assert np.allclose(cv.final.coef, same.coef_, rtol=1e-10, atol=1e-12)
    assert np.allclose(cv.final.mean, same.mean_, rtol=1e-12)
    assert np.allclose(cv.final.scale, same.scale_, rtol=1e-12)
    for C, loss in same.cv_log_loss_.items():
        assert cv.cv_log_loss[C] == pytest.approx(loss, rel=1e-12)
    # Reference: scikit-learn (the in-memory fit: StandardScaler, LogisticRegression with
    # newton-cholesky at tol 1e-6, GroupKFold, log_loss). Its solver stops about 1e-6 from
    # the optimum (tests/reranker/test_blockfit.py), hence the tolerances.
    sk = Reranker(Cs=(0.1, 1.0, 10.0), fit="memory").fit(t["X"], t["y"], t["clue_id"], names)
    assert cv.C == sk.C_
    big = float(np.max(np.abs(sk.coef_)))
    assert np.max(np.abs(cv.final.coef - sk.coef_)) <= 1e-5 * big
    assert abs(cv.final.intercept - sk.intercept_) <= 1e-5 * big
    for C, loss in sk.cv_log_loss_.items():
        assert cv.cv_log_loss[C] == pytest.approx(loss, rel=1e-6)
