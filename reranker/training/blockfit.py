"""The reranker's logistic fit by map-reduce over blocks of rows, for tables too big to gather.

It fits exactly what `fitting.make_pipeline_for(C)` fits: features standardised (mean and
population standard deviation, a constant column scaled by 1, as scikit-learn's
StandardScaler does), then an L2-penalised logistic regression with an unpenalised
intercept, minimising  C * sum(log-loss) + 0.5 * ||w||^2  (scikit-learn's LogisticRegression
objective; C = inf: no penalty). Each block returns sums (rows, feature sums, squared
deviations; then the log-loss, its gradient and Hessian at the current weights), in plain
numpy; the driver adds them and takes Newton steps, halving a step that does not lower the
objective. Written by hand because the blocks' sums are the whole point: scikit-learn's
solvers need every row in one array. Ray only distributes the blocks (`Runner.map`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import psutil
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from retriever.cluster import Runner

from ..errors import TrainingError

Block = tuple[np.ndarray, np.ndarray]  # (X float64 rows x features, y 0/1)


def block_sums(block: Block) -> tuple[int, np.ndarray]:
    """Rows and per-feature sums of one block."""
    X, _ = block
    return X.shape[0], X.sum(axis=0)


def block_deviations(block: Block, mean: np.ndarray) -> np.ndarray:
    """Per-feature sums of squared deviations from `mean` (the second pass of the variance)."""
    return ((block[0] - mean) ** 2).sum(axis=0)


def block_newton(
    block: Block, mean: np.ndarray, scale: np.ndarray, w: np.ndarray
) -> tuple[float, np.ndarray, np.ndarray]:
    """Log-loss sum, its gradient and Hessian over one block at weights w = (coef, intercept)."""
    X, y = block
    Z = np.hstack([(X - mean) / scale, np.ones((X.shape[0], 1))])
    z = Z @ w
    # log(1 + e^z) - y z, stably; p = sigmoid(z).
    loss = float(np.sum(np.logaddexp(0.0, z) - y * z))
    p = 0.5 * (1.0 + np.tanh(0.5 * z))
    grad = Z.T @ (p - y)
    hess = (Z * (p * (1.0 - p))[:, None]).T @ Z
    return loss, grad, hess


@dataclass(frozen=True)
class BlockFit:
    """What the block fit learned: the scaler's and the model's numbers."""

    mean: np.ndarray
    scale: np.ndarray
    coef: np.ndarray
    intercept: float
    n_iter: int

    def pipeline(self) -> Pipeline:
        """A fitted scikit-learn pipeline holding these numbers (predict_proba as usual)."""
        scaler = StandardScaler()
        scaler.mean_, scaler.scale_ = self.mean, self.scale
        scaler.var_ = self.scale**2
        scaler.n_features_in_ = self.mean.size
        scaler.n_samples_seen_ = 0
        lr = LogisticRegression()
        lr.classes_ = np.array([0, 1])
        lr.coef_ = self.coef[None, :].copy()
        lr.intercept_ = np.array([self.intercept])
        lr.n_features_in_ = self.mean.size
        lr.n_iter_ = np.array([self.n_iter])
        return make_pipeline(scaler, lr)


def penalised(
    loss: float, grad: np.ndarray, hess: np.ndarray, w: np.ndarray, C: float
) -> tuple[float, np.ndarray, np.ndarray]:
    """The objective C * log-loss + 0.5 * ||coef||^2 (the intercept unpenalised), its gradient
    and Hessian, from the log-loss sums; C = inf: the log-loss alone."""
    if np.isinf(C):
        return loss, grad, hess
    penalty = np.ones(w.size)
    penalty[-1] = 0.0  # the intercept is not penalised
    return (
        C * loss + 0.5 * float(np.sum(penalty * w * w)),
        C * grad + penalty * w,
        C * hess + np.diag(penalty),
    )


def _objective(
    runner: Runner,
    blocks: Sequence[Any],
    mean: np.ndarray,
    scale: np.ndarray,
    w: np.ndarray,
    C: float,
) -> tuple[float, np.ndarray, np.ndarray]:
    parts = runner.map(block_newton, [(b, mean, scale, w) for b in blocks])
    loss = sum(p[0] for p in parts)
    grad = np.sum([p[1] for p in parts], axis=0)
    hess = np.sum([p[2] for p in parts], axis=0)
    return penalised(loss, grad, hess, w, C)


def fit_blocks(
    blocks: Sequence[Block],
    C: float,
    *,
    runner: Runner | None = None,
    max_iter: int = 100,
    tol: float = 1e-10,
) -> BlockFit:
    """Fit the scaler and the logistic model over `blocks` (each block one map task)."""
    runner = runner if runner is not None else Runner(None)
    refs = [runner.put(b) for b in blocks]  # each block sent to the cluster once
    counts = runner.map(block_sums, [(b,) for b in refs])
    n = sum(c[0] for c in counts)
    if n == 0:
        raise TrainingError("no rows to fit")
    mean = np.sum([c[1] for c in counts], axis=0) / n
    var = np.sum(runner.map(block_deviations, [(b, mean) for b in refs]), axis=0) / n
    scale = np.sqrt(var)
    # StandardScaler's rule for a constant column (scikit-learn's _is_constant_feature):
    # left unscaled.
    eps = np.finfo(np.float64).eps
    scale[var <= n * eps * var + (n * mean * eps) ** 2] = 1.0
    w = np.zeros(mean.size + 1)
    obj, grad, hess = _objective(runner, refs, mean, scale, w, C)
    for it in range(1, max_iter + 1):
        step = np.linalg.solve(hess, grad)
        t = 1.0
        while True:
            new_w = w - t * step
            new_obj, new_grad, new_hess = _objective(runner, refs, mean, scale, new_w, C)
            if new_obj <= obj + 1e-12 * abs(obj) or t < 1e-8:
                break
            t /= 2
        w, obj, grad, hess = new_w, new_obj, new_grad, new_hess
        if np.max(np.abs(t * step)) <= tol * max(1.0, float(np.max(np.abs(w)))):
            return BlockFit(mean, scale, w[:-1].copy(), float(w[-1]), it)
    raise TrainingError(f"the block fit did not converge in {max_iter} Newton steps")


def split_rows(X: np.ndarray, y: np.ndarray, rows_per_block: int) -> list[Block]:
    """Consecutive blocks of at most `rows_per_block` rows."""
    if rows_per_block < 1:
        raise ValueError(f"rows per block must be at least 1, got {rows_per_block}")
    return [
        (X[s : s + rows_per_block], y[s : s + rows_per_block].astype(np.float64))
        for s in range(0, X.shape[0], rows_per_block)
    ]


FIT_MODES = ("auto", "memory", "blocks")
# The in-memory fit holds the gathered table and a few working copies of it at once (the
# scaled copy, a fold's training rows, the solver's arrays), so 'auto' lets the table itself
# take a quarter of the memory available when training starts (rule of thumb: common
# practice, no source).
FIT_BUDGET_SHARE = 0.25


def default_fit_budget() -> int:
    """Bytes of features the in-memory fit may gather: a share of the memory available now."""
    return int(psutil.virtual_memory().available * FIT_BUDGET_SHARE)


def _mib(n: float) -> str:
    return f"{n / 1024**2:,.1f} MiB"


@dataclass(frozen=True)
class FitChoice:
    """Which fit runs ('memory': scikit-learn on the gathered table; 'blocks': the map-reduce
    Newton fit) and why, with the figures the choice was made on."""

    method: str
    reason: str
    table_bytes: int  # rows x features x 8 bytes
    budget_bytes: int | None  # None: the fit was asked for, no budget consulted

    def to_dict(self) -> dict[str, Any]:
        """Plain data for the model file's `fit` (left out of the model's version: the
        default budget follows the memory free at the time)."""
        return {
            "method": self.method,
            "reason": self.reason,
            "table_bytes": self.table_bytes,
            "budget_bytes": self.budget_bytes,
        }


def choose_fit(mode: str, rows: int, features: int, budget: int | None = None) -> FitChoice:
    """The fit for a table of `rows` x `features` float64s under `mode` ('auto', 'memory' or
    'blocks'). 'auto' gathers the table when its estimated size is under `budget` bytes
    (default: `default_fit_budget()`), else fits in blocks."""
    if mode not in FIT_MODES:
        raise ValueError(f"fit must be one of {FIT_MODES}, got {mode!r}")
    size = int(rows) * int(features) * 8
    if mode != "auto":
        return FitChoice(mode, f"asked for (fit={mode!r})", size, None)
    if budget is None:
        budget = default_fit_budget()
    elif budget < 1:
        raise ValueError(f"the fit's memory budget must be at least 1 byte, got {budget}")
    if size < budget:
        why = f"the table's {_mib(size)} of features fit the memory budget of {_mib(budget)}"
        return FitChoice("memory", why, size, budget)
    why = (
        f"the table's {_mib(size)} of features exceed the memory budget of {_mib(budget)}: "
        "fitted by map-reduce over blocks of rows"
    )
    return FitChoice("blocks", why, size, budget)


def block_fitter(
    rows_per_block: int, runner: Runner | None, max_iter: int = 100
) -> Callable[[np.ndarray, np.ndarray, float], Pipeline]:
    """fit(X, y, C) -> a fitted pipeline, by the block fit."""

    def fit(X: np.ndarray, y: np.ndarray, C: float) -> Pipeline:
        blocks = split_rows(X, y, rows_per_block)
        return fit_blocks(blocks, C, runner=runner, max_iter=max_iter).pipeline()

    return fit
