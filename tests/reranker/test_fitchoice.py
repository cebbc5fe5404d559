"""The fit chooses by itself: the table gathered for scikit-learn when its estimated size is
under a memory budget, else the map-reduce Newton fit; the model file says which and why."""

from __future__ import annotations

import numpy as np
import psutil
import pytest
from sklearn.linear_model import LogisticRegression
from sklearn.preprocessing import StandardScaler

from reranker.artifact import artifact_version
from reranker.training import TrainResult
from reranker.training.blockfit import FIT_BUDGET_SHARE, choose_fit
from reranker.training.estimator import Reranker


def test_the_budget_decides_in_auto_mode() -> None:
    # 100 rows x 4 features x 8 bytes = 3200 bytes: gathered only under a larger budget.
    assert choose_fit("auto", 100, 4, budget=3201).method == "memory"
    over = choose_fit("auto", 100, 4, budget=3200)
    assert (over.method, over.table_bytes, over.budget_bytes) == ("blocks", 3200, 3200)
    assert "exceed the memory budget" in over.reason
    asked = choose_fit("memory", 10**9, 100, budget=1)
    assert (asked.method, asked.budget_bytes) == ("memory", None) and "asked for" in asked.reason
    assert choose_fit("blocks", 1, 1).method == "blocks"
    with pytest.raises(ValueError, match="fit must be one of"):
        choose_fit("disk", 1, 1)
    with pytest.raises(ValueError, match="memory budget must be at least 1 byte"):
        choose_fit("auto", 1, 1, budget=0)


def test_default_budget_is_a_share_of_the_memory_available() -> None:
    choice = choose_fit("auto", 10, 10)
    assert choice.budget_bytes is not None
    # Reference: psutil's figures for this machine, read around the choice.
    assert 0 < choice.budget_bytes <= psutil.virtual_memory().total * FIT_BUDGET_SHARE


def _reference(X: np.ndarray, y: np.ndarray, C: float, tol: float) -> LogisticRegression:
    """scikit-learn's StandardScaler then LogisticRegression at `C` (newton-cholesky)."""
    Z = StandardScaler().fit_transform(X)
    return LogisticRegression(C=C, solver="newton-cholesky", tol=tol, max_iter=5000).fit(Z, y)


@pytest.mark.parametrize("over_budget", [False, True])
def test_either_fit_equals_scikit_learn(world_trained: TrainResult, over_budget: bool) -> None:
    """Real training rows of the invented world, the budget just above or at the table's size."""
    t = world_trained.table
    size = t.X.shape[0] * t.X.shape[1] * 8
    est = Reranker(fit="auto", fit_budget=size if over_budget else size + 1, block_rows=2000)
    est.fit(t.X, t.y, t.clue_id, t.feature_names)
    assert est.fit_choice_.method == ("blocks" if over_budget else "memory")
    assert est.fitted_in_blocks_ == over_budget
    Z = StandardScaler().fit_transform(t.X)
    if not over_budget:
        # Reference: scikit-learn's LogisticRegression with the C the estimator chose and the
        # reranker's settings (newton-cholesky, tol 1e-6): the gathered table is fitted by
        # scikit-learn itself, so the numbers agree to rounding (1e-9 of the largest).
        want = _reference(t.X, t.y, est.C_, 1e-6)
        scale = float(np.max(np.abs(want.coef_[0])))
        assert np.max(np.abs(est.coef_ - want.coef_[0])) <= 1e-9 * scale
        assert abs(est.intercept_ - want.intercept_[0]) <= 1e-9 * scale
        return
    # Reference: scikit-learn's LogisticRegression with the same C solved tightly (tol 1e-10).
    # The block fit stops on its Newton step (1e-10), so coefficients agree to 1e-5 of the
    # largest and probabilities to 1e-8. (At tol 1e-6 scikit-learn stops up to 0.1 away
    # along this table's nearly collinear features, probabilities 1e-3 apart.)
    want = _reference(t.X, t.y, est.C_, 1e-10)
    scale = float(np.max(np.abs(want.coef_[0])))
    assert np.max(np.abs(est.coef_ - want.coef_[0])) <= 1e-5 * scale
    assert abs(est.intercept_ - want.intercept_[0]) <= 1e-5 * scale
    assert np.max(np.abs(est.raw_probability(t.X) - want.predict_proba(Z)[:, 1])) <= 1e-8


def test_the_model_file_says_which_fit_ran_and_why(world_trained: TrainResult) -> None:
    # The default budget (a quarter of the memory available) holds the world's small table;
    # tests/cli/test_model.py trains with a budget it exceeds.
    roomy = world_trained.artifact["fit"]
    assert roomy["method"] == "memory" and "fit the memory budget" in roomy["reason"]
    rows, width = world_trained.table.X.shape
    assert roomy["table_bytes"] == rows * width * 8 and roomy["budget_bytes"] > 0


def test_the_budget_is_not_part_of_the_model_version(world_trained: TrainResult) -> None:
    # The default budget follows the memory free when training starts: the same data must
    # still give the same version, while anything the model computes changes it.
    art = world_trained.artifact
    other = {**art, "fit": {**art["fit"], "budget_bytes": art["fit"]["budget_bytes"] + 4096}}
    assert artifact_version(other) == artifact_version(art) == art["model_version"]
    assert artifact_version({**art, "intercept": art["intercept"] + 1.0}) != art["model_version"]
