"""The map-reduce logistic fit against scikit-learn and statsmodels, in process and on Ray."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest

from reranker.training.blockfit import choose_fit, fit_blocks, split_rows
from reranker.training.estimator import Reranker
from reranker.training.fitting import make_pipeline_for
from retriever.cluster import Runner


def _data(n: int = 2500, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Invented features of very different scales (one constant) and labels from a logit."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5)) * [1.0, 10.0, 0.1, 3.0, 1.0] + [0.0, 5.0, 0.0, -2.0, 0.0]
    X = np.hstack([X, np.full((n, 1), 2.0)])
    z = X[:, 0] - 0.3 * X[:, 1] + 5 * X[:, 2] + 0.5
    y = (rng.random(n) < 1 / (1 + np.exp(-z))).astype(np.int64)
    return X, y


def _relative(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.abs(b)))


@pytest.mark.parametrize("C", [0.01, 1.0, 100.0])
def test_block_fit_equals_scikit_learn(C: float) -> None:
    # Reference: scikit-learn's LogisticRegression (newton-cholesky) after its StandardScaler,
    # with the settings the reranker fits with (fitting.make_pipeline_for) but a tighter
    # tolerance: at the reranker's tol 1e-6 scikit-learn itself stops about 1e-6 (relative)
    # from the optimum, which the looser check below allows for.
    X, y = _data()
    want = make_pipeline_for(C).set_params(logisticregression__tol=1e-10).fit(X, y)
    today = make_pipeline_for(C).fit(X, y)
    got = fit_blocks(split_rows(X, y, 700), C)  # four uneven blocks
    assert _relative(got.coef[:5], want[-1].coef_[0][:5]) < 1e-6
    assert _relative(got.coef[:5], today[-1].coef_[0][:5]) < 1e-5
    assert got.coef[5] == want[-1].coef_[0][5] == 0.0  # the constant column
    assert abs(got.intercept - want[-1].intercept_[0]) <= 1e-6 * abs(want[-1].intercept_[0])
    assert np.allclose(got.mean, want[0].mean_, rtol=1e-12)
    assert np.allclose(got.scale, want[0].scale_, rtol=1e-12)
    p = got.pipeline().predict_proba(X)[:, 1]
    assert np.allclose(p, want.predict_proba(X)[:, 1], rtol=0, atol=1e-6)


def test_unregularised_block_fit_equals_statsmodels() -> None:
    # Reference: statsmodels' Logit (maximum likelihood, Newton) on the same standardised
    # features with a constant column: the unpenalised optimum.
    sm = pytest.importorskip("statsmodels.api")
    X, y = _data(seed=5)
    X = X[:, :5]
    got = fit_blocks(split_rows(X, y, 600), float("inf"))
    Z = sm.add_constant((X - X.mean(axis=0)) / X.std(axis=0))
    res = sm.Logit(y, Z).fit(disp=0, method="newton", tol=1e-12, maxiter=100)
    assert _relative(got.coef, res.params[1:]) < 1e-6
    assert abs(got.intercept - res.params[0]) <= 1e-6 * abs(res.params[0])


def test_fit_modes() -> None:
    X, _ = _data(10)
    assert [choose_fit(m, *X.shape).method for m in ("auto", "blocks", "memory")] == [
        "memory",
        "blocks",
        "memory",
    ]
    with pytest.raises(ValueError, match="fit must be one of"):
        choose_fit("disk", *X.shape)
    with pytest.raises(ValueError, match="rows per block"):
        split_rows(X, np.zeros(10), 0)


def _grouped(n_clues: int = 120, k: int = 10, seed: int = 2) -> tuple[np.ndarray, ...]:
    """Candidate rows grouped by clue, one right answer each (invented)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_clues * k, 3))
    y = np.zeros(n_clues * k, dtype=np.int64)
    best = np.argmax(X[:, 0].reshape(n_clues, k) + rng.normal(size=(n_clues, k)), axis=1)
    y[np.arange(n_clues) * k + best] = 1
    return X, y, np.repeat(np.arange(n_clues), k)


def _reranker_fits_equal(runner: Runner | None) -> None:
    X, y, groups = _grouped()
    names = ["a", "b", "c"]
    memory = Reranker(fit="memory").fit(X, y, groups, names)
    blocks = Reranker(fit="blocks", block_rows=250, runner=runner).fit(X, y, groups, names)
    assert blocks.fitted_in_blocks_ and not memory.fitted_in_blocks_
    assert blocks.C_ == memory.C_
    assert _relative(blocks.coef_, memory.coef_) < 1e-6
    for C, loss in memory.cv_log_loss_.items():
        assert blocks.cv_log_loss_[C] == pytest.approx(loss, rel=1e-6)


def test_reranker_fitted_in_blocks_equals_the_memory_fit() -> None:
    _reranker_fits_equal(None)


@pytest.fixture(scope="module")
def ray_runner() -> Iterator[Runner]:
    """A two-CPU local Ray cluster for the module, through the project's runner."""
    ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    yield Runner("local")
    ray.shutdown()


@pytest.mark.slow
def test_block_fit_on_ray_equals_in_process(ray_runner: Runner) -> None:
    X, y = _data()
    here = fit_blocks(split_rows(X, y, 700), 1.0)
    there = fit_blocks(split_rows(X, y, 700), 1.0, runner=ray_runner)
    assert np.array_equal(there.coef, here.coef) and there.intercept == here.intercept
    _reranker_fits_equal(ray_runner)
