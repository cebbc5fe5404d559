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
    if np.isinf(C):
        return loss, grad, hess
    penalty = np.ones(w.size)
    penalty[-1] = 0.0  # the intercept is not penalised
    return (
        C * loss + 0.5 * float(np.sum(penalty * w * w)),
        C * grad + penalty * w,
        C * hess + np.diag(penalty),
    )


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


# Above this many bytes of features the table is fitted in blocks (rule of thumb: a few
# copies of the table are made while fitting in memory; common practice, no source).
MEMORY_FIT_BYTES = 2 * 1024**3
FIT_MODES = ("auto", "memory", "blocks")


def use_blocks(mode: str, X: np.ndarray) -> bool:
    """Whether `mode` ('auto', 'memory' or 'blocks') fits this table in blocks."""
    if mode not in FIT_MODES:
        raise ValueError(f"fit must be one of {FIT_MODES}, got {mode!r}")
    return mode == "blocks" or (mode == "auto" and X.nbytes > MEMORY_FIT_BYTES)


def block_fitter(
    rows_per_block: int, runner: Runner | None, max_iter: int = 100
) -> Callable[[np.ndarray, np.ndarray, float], Pipeline]:
    """fit(X, y, C) -> a fitted pipeline, by the block fit."""

    def fit(X: np.ndarray, y: np.ndarray, C: float) -> Pipeline:
        blocks = split_rows(X, y, rows_per_block)
        return fit_blocks(blocks, C, runner=runner, max_iter=max_iter).pipeline()

    return fit
