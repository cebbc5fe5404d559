"""The reranker's grouped cross-validated fit over blocks of rows that stay where they are.

What `Reranker.fit` does on a gathered table, done by passes over blocks (each block a dict
of columns with at least `X`, `y` and `clue_id`; on Ray an object reference, never fetched
by the driver): the folds are GroupKFold's, computed from each clue's row count alone; each
fold's scaler and model, for every C, are fitted at once by the Newton steps of
reranker/training/blockfit.py (one pass over the blocks per step, every model's gradient
and Hessian from each block); the held-out log-loss of each C is summed block by block;
then the model is fitted on every row at the chosen C. The driver holds only per-clue
counts and a few (features + 1)^2 matrices per model.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.metrics import log_loss
from tqdm.auto import tqdm

from retriever.cluster import Runner

from ..errors import TrainingError
from .blockfit import BlockFit, block_newton, penalised
from .fitting import positive_proba

ALL = -1  # the training set of every row (a fold's set: the rows of the other folds)
CHUNK = 8  # block results the driver holds at once, per pass


def clue_folds(sizes: np.ndarray, n_folds: int) -> np.ndarray:
    """Each clue's fold, as scikit-learn's GroupKFold (no shuffle) assigns it from the
    clues' row counts: the largest clue first, each to the fold with the fewest rows.
    `sizes`: rows per clue, in ascending clue-id order (`tests` compare with GroupKFold)."""
    order = np.argsort(sizes, kind="stable")[::-1]
    per_fold = np.zeros(n_folds)
    fold = np.zeros(sizes.size, dtype=np.int64)
    for i in order:
        lightest = int(np.argmin(per_fold))
        per_fold[lightest] += sizes[i]
        fold[i] = lightest
    return fold


def _in_set(fold: np.ndarray, s: int) -> np.ndarray:
    return np.ones(fold.size, dtype=bool) if s == ALL else fold != s


def block_moments(block: dict[str, np.ndarray], fold_of: np.ndarray, n_folds: int) -> Any:
    """Per fold of the block's rows: rows, positives and feature sums."""
    fold = fold_of[block["clue_id"]]
    X, y = block["X"], block["y"]
    rows = np.bincount(fold, minlength=n_folds)
    pos = np.bincount(fold, weights=y.astype(np.float64), minlength=n_folds)
    sums = np.stack([X[fold == f].sum(axis=0) for f in range(n_folds)])
    return rows, pos, sums


def block_deviations(
    block: dict[str, np.ndarray], fold_of: np.ndarray, sets: Sequence[int], means: np.ndarray
) -> np.ndarray:
    """Per training set: the sums of squared deviations from that set's mean."""
    fold = fold_of[block["clue_id"]]
    X = block["X"]
    pairs = zip(sets, means, strict=True)
    return np.stack([((X[_in_set(fold, s)] - m) ** 2).sum(axis=0) for s, m in pairs])


def block_newton_many(
    block: dict[str, np.ndarray], fold_of: np.ndarray, models: Sequence[tuple[Any, ...]]
) -> list[tuple[float, np.ndarray, np.ndarray]]:
    """`blockfit.block_newton` of every model (training set, mean, scale, w) on its rows."""
    fold = fold_of[block["clue_id"]]
    X, y = block["X"], block["y"].astype(np.float64)
    out = []
    for s, mean, scale, w in models:
        keep = _in_set(fold, s)
        out.append(block_newton((X[keep], y[keep]), mean, scale, w))
    return out


def block_held_out_loss(
    block: dict[str, np.ndarray], fold_of: np.ndarray, fits: Sequence[Sequence[BlockFit]]
) -> np.ndarray:
    """For each C's fold models: the sum of the block's held-out log-losses (each row scored
    by the model fitted without its fold, as scikit-learn's log_loss scores it)."""
    fold = fold_of[block["clue_id"]]
    X, y = block["X"], block["y"].astype(np.int64)
    out = np.zeros(len(fits))
    for c, per_fold in enumerate(fits):
        p = np.zeros(y.size)
        for f, fit in enumerate(per_fold):
            test = fold == f
            if test.any():
                p[test] = positive_proba(fit.pipeline(), X[test])
        out[c] = log_loss(y, p, labels=[0, 1], normalize=False) if y.size else 0.0
    return out


def _reduce(
    runner: Runner,
    fn: Callable[..., Any],
    blocks: Sequence[Any],
    args: tuple[Any, ...],
    add: Callable[[Any, Any], Any],
) -> Any:
    """fn(block, *args) over every block, added up in block order, CHUNK results at a time."""
    total: Any = None
    for s in range(0, len(blocks), CHUNK):
        for part in runner.map(fn, [(b, *args) for b in blocks[s : s + CHUNK]]):
            total = part if total is None else add(total, part)
    return total


def _add_parts(a: list[Any], b: list[Any]) -> list[Any]:
    return [(x[0] + y[0], x[1] + y[1], x[2] + y[2]) for x, y in zip(a, b, strict=True)]


@dataclass(eq=False)
class _Model:
    at: int  # position in the specs
    s: int
    C: float
    w: np.ndarray
    step: np.ndarray
    obj: float = 0.0
    t: float = 1.0
    it: int = 0
    done: bool = False


def newton_many(
    runner: Runner,
    blocks: Sequence[Any],
    fold_of: Any,
    specs: Sequence[tuple[int, float]],
    scaler: dict[int, tuple[np.ndarray, np.ndarray]],
    *,
    max_iter: int = 100,
    tol: float = 1e-10,
    on_pass: Callable[[], object] | None = None,
) -> tuple[list[BlockFit], int]:
    """`blockfit.fit_blocks`'s Newton steps, with its step halving and stopping rule, for
    every (training set, C) of `specs` at once: one pass over the blocks per step.
    Returns the fits and the passes made."""
    width = next(iter(scaler.values()))[0].size + 1
    models = [_Model(i, s, C, np.zeros(width), np.zeros(width)) for i, (s, C) in enumerate(specs)]
    fits: list[BlockFit | None] = [None] * len(models)
    passes = 0
    first = True
    while not all(m.done for m in models):
        live = [m for m in models if not m.done]
        proposals = [m.w if first else m.w - m.t * m.step for m in live]
        calls = [(m.s, *scaler[m.s], w) for m, w in zip(live, proposals, strict=True)]
        parts = _reduce(
            runner,
            block_newton_many,
            blocks,
            (fold_of, calls),
            _add_parts,
        )
        passes += 1
        if on_pass is not None:
            on_pass()
        for m, w, (loss, grad, hess) in zip(live, proposals, parts, strict=True):
            obj, g, h = penalised(loss, grad, hess, w, m.C)
            if not first:
                if not (obj <= m.obj + 1e-12 * abs(m.obj) or m.t < 1e-8):
                    m.t /= 2
                    continue
                m.it += 1
                moved = np.max(np.abs(m.t * m.step))
                if moved <= tol * max(1.0, float(np.max(np.abs(w)))):
                    mean, scale = scaler[m.s]
                    fits[m.at] = BlockFit(mean, scale, w[:-1].copy(), float(w[-1]), m.it)
                    m.done = True
                    continue
                if m.it >= max_iter:
                    raise TrainingError(
                        f"the block fit did not converge in {max_iter} Newton steps"
                    )
            m.w, m.obj = w, obj
            m.step, m.t = np.linalg.solve(h, g), 1.0
        first = False
    return [f for f in fits if f is not None], passes


def scalers(
    runner: Runner, blocks: Sequence[Any], fold_of: Any, n_folds: int
) -> tuple[dict[int, tuple[np.ndarray, np.ndarray]], np.ndarray, np.ndarray]:
    """Each training set's (mean, scale) as StandardScaler fits them (population deviation, a
    constant column scaled by 1), and the rows and positives of each fold."""
    rows, pos, sums = _reduce(
        runner,
        block_moments,
        blocks,
        (fold_of, n_folds),
        lambda a, b: (a[0] + b[0], a[1] + b[1], a[2] + b[2]),
    )
    sets = [*range(n_folds), ALL]
    n = np.array([rows.sum() - rows[f] for f in range(n_folds)] + [rows.sum()], dtype=np.float64)
    total = sums.sum(axis=0)
    means = np.stack([total - sums[f] for f in range(n_folds)] + [total]) / n[:, None]
    dev = _reduce(runner, block_deviations, blocks, (fold_of, sets, means), np.add)
    out = {}
    eps = np.finfo(np.float64).eps
    for i, s in enumerate(sets):
        var = dev[i] / n[i]
        scale = np.sqrt(var)
        # StandardScaler's rule for a constant column (as in blockfit.fit_blocks).
        scale[var <= n[i] * eps * var + (n[i] * means[i] * eps) ** 2] = 1.0
        out[s] = (means[i], scale)
    return out, rows, pos


@dataclass(frozen=True)
class BlockCV:
    """The cross-validated block fit: the chosen C, every C's held-out log-loss, the fold
    models at the chosen C (to score held-out rows), the model on every row, and passes."""

    C: float
    cv_log_loss: dict[str, float]
    fold_fits: list[BlockFit]
    final: BlockFit
    passes: int


def cross_validated_fit(
    runner: Runner,
    blocks: Sequence[Any],
    fold_of_clue: np.ndarray,
    n_folds: int,
    Cs: Sequence[float],
    progress: bool = False,
) -> BlockCV:
    """Choose C by the grouped folds' held-out log-loss, then fit every row at that C."""
    with tqdm(desc="fitting in blocks", unit=" passes", disable=not progress) as bar:
        return _cross_validated_fit(runner, blocks, fold_of_clue, n_folds, Cs, bar.update)


def _cross_validated_fit(
    runner: Runner,
    blocks: Sequence[Any],
    fold_of_clue: np.ndarray,
    n_folds: int,
    Cs: Sequence[float],
    on_pass: Callable[[], object],
) -> BlockCV:
    fold_of = runner.put(fold_of_clue)  # sent to the cluster once
    scaler, rows, pos = scalers(runner, blocks, fold_of, n_folds)
    n, positives = int(rows.sum()), float(pos.sum())
    if positives == 0 or positives == n:
        raise TrainingError(
            "training needs both right and wrong candidates; "
            "check that gold answers resolve and appear among the candidates"
        )
    for f in range(n_folds):
        train_pos, train_rows = positives - pos[f], n - rows[f]
        if train_pos == 0 or train_pos == train_rows:
            raise TrainingError(
                "a cross-validation fold has only one label; add more labelled clues"
            )
    specs = [(f, C) for C in Cs for f in range(n_folds)]
    fitted, passes = newton_many(runner, blocks, fold_of, specs, scaler, on_pass=on_pass)
    per_c = [fitted[i * n_folds : (i + 1) * n_folds] for i in range(len(Cs))]
    losses = _reduce(runner, block_held_out_loss, blocks, (fold_of, per_c), np.add) / n
    cv_log_loss = {repr(C): float(loss) for C, loss in zip(Cs, losses, strict=True)}
    best = min(range(len(Cs)), key=lambda i: (losses[i], i))
    (final,), more = newton_many(
        runner, blocks, fold_of, [(ALL, Cs[best])], scaler, on_pass=on_pass
    )
    return BlockCV(float(Cs[best]), cv_log_loss, per_c[best], final, passes + more + 3)
