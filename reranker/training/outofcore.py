"""Training on a table the driver never gathers: its rows stay in blocks on the Ray cluster.

The table's blocks (reranker/training/tableblocks.py `row_blocks`) are object references.
One pass counts them (rows, positives, each clue's rows, recall@k of the whole clues); the
fit chooser (blockfit.choose_fit) reads those counts. Gathered when the table fits the
budget; otherwise the scaler, C and coefficients come from every row by block passes
(reranker/training/blockcv.py), and what needs rows side by side in one process, the
calibrator (isotonic regression sorts every probability), the per-clue presence model, the
decision threshold and the held-out figures, uses a bounded sample of whole clues (chosen
by a seeded shuffle of the clues, all of them when they fit): their rows, with held-out
probabilities from the fold models, are the only rows the driver holds. The model file's
`fit` says so, with the sample's size.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from retriever.cluster import Runner

from ..errors import TrainingError
from ..model import LinearModel
from .blockcv import clue_folds, cross_validated_fit
from .blockfit import FitChoice, choose_fit
from .estimator import Reranker
from .fitting import cross_calibrate, fit_calibrator, positive_proba
from .prefixrows import _DTYPES, Prefixes
from .table import TrainingTable
from .tableblocks import row_blocks

SAMPLE_ROWS = 100_000  # the most rows the driver gathers for calibration and the decision
# (a calibrator and a threshold from 100k rows, about 5,000 prefixes, move by less than
# their own held-out noise: rule of thumb, common practice, no source)
SAMPLE_SEED = 0


def block_facts(block: dict[str, np.ndarray]) -> dict[str, Any]:
    """One block's counts: rows, positives, rows per clue, and its whole-clue prefixes
    (how many, the first and last, and how many have the answer among their rows)."""
    clue, counts = np.unique(block["clue_id"], return_counts=True)
    full = block["fraction"] == 1.0
    groups = np.unique(block["group"][full])
    hits = np.unique(block["group"][full & (block["y"] == 1)])
    return {
        "rows": int(block["y"].size),
        "positives": int(block["y"].sum()),
        "clues": (clue, counts),
        "full": (int(groups.size), groups[:1], groups[-1:]),
        "hits": (int(hits.size), hits[:1], hits[-1:]),
    }


def _distinct(parts: Sequence[tuple[int, np.ndarray, np.ndarray]]) -> int:
    """Distinct groups over blocks in prefix order: a group cut by a block's end counts once."""
    total, last = 0, None
    for n, first, end in parts:
        if n == 0:
            continue
        total += n - int(last is not None and first[0] == last)
        last = end[0]
    return total


@dataclass(frozen=True)
class TableFacts:
    """Counts of a table held in blocks."""

    rows: int
    positives: int
    clue_rows: np.ndarray  # rows of each clue id (0 for a clue without candidates)
    recall: float  # share of whole-clue prefixes with the answer among their candidates
    blocks: int


def table_facts(runner: Runner, blocks: Sequence[Any], n_clues: int) -> TableFacts:
    """One pass over the blocks (results in block order, which is prefix order)."""
    parts = runner.map(block_facts, [(b,) for b in blocks])
    clue_rows = np.zeros(n_clues, dtype=np.int64)
    for p in parts:
        np.add.at(clue_rows, p["clues"][0], p["clues"][1])
    full = _distinct([p["full"] for p in parts])
    hits = _distinct([p["hits"] for p in parts])
    return TableFacts(
        rows=sum(p["rows"] for p in parts),
        positives=sum(p["positives"] for p in parts),
        clue_rows=clue_rows,
        recall=float(hits / full) if full else 0.0,
        blocks=len(blocks),
    )


def block_rows_of(block: dict[str, np.ndarray], clues: np.ndarray | None) -> dict[str, Any]:
    """The block's rows of `clues` (sorted ids; None: every row)."""
    if clues is None:
        return dict(block)
    keep = np.isin(block["clue_id"], clues)
    return {c: v[keep] for c, v in block.items()}


def gather(
    runner: Runner, blocks: Sequence[Any], width: int, clues: np.ndarray | None = None
) -> dict[str, np.ndarray]:
    """The rows of `clues` (None: all) in one table, in prefix order."""
    parts = [p for p in runner.map(block_rows_of, [(b, clues) for b in blocks]) if p["y"].size]
    if not parts:
        return {"X": np.zeros((0, width)), **{c: np.zeros(0, dt) for c, dt in _DTYPES.items()}}
    cols = {c: np.concatenate([p[c] for p in parts]) for c in ("X", *_DTYPES)}
    order = np.argsort(cols["group"], kind="stable")
    return {c: v[order] for c, v in cols.items()}


def as_table(cols: dict[str, np.ndarray], pre: Prefixes, names: list[str]) -> TrainingTable:
    """Gathered columns as the TrainingTable `build_table` makes."""
    return TrainingTable(
        **{c: cols[c] for c in ("X", *_DTYPES)},
        feature_names=names,
        unresolved=pre.unresolved,
        n_clues=pre.n_clues,
        n_prefixes=len(pre.texts),
        clues=pre.kept,
        texts=pre.texts,
    )


def sample_clues(clue_rows: np.ndarray, cap: int, seed: int = SAMPLE_SEED) -> np.ndarray:
    """Whole clues in a seeded shuffle while their rows stay within `cap` (sorted ids)."""
    present = np.flatnonzero(clue_rows)
    order = np.random.default_rng(seed).permutation(present)
    keep = order[np.cumsum(clue_rows[order]) <= cap]
    return np.sort(keep)


@dataclass
class OutOfCoreFit:
    """The estimator (its `oof_proba_` of the sample's rows), the sample as a table, the
    whole table's counts, and the facts for the model file's `fit`."""

    estimator: Reranker
    sample: TrainingTable
    facts: TableFacts
    record: dict[str, Any]


def fit_out_of_core(
    runner: Runner,
    blocks: Sequence[Any],
    pre: Prefixes,
    names: list[str],
    choice: FitChoice,
    facts: TableFacts,
    *,
    calibration: str = "auto",
    sample_rows: int = SAMPLE_ROWS,
    n_folds: int = 5,
    progress: bool = False,
) -> OutOfCoreFit:
    """Reranker.fit's model from every row in blocks; calibration on a sample of clues."""
    est = Reranker(calibration=calibration, fit="blocks", runner=runner, n_folds=n_folds)
    est._check_settings()
    present = np.flatnonzero(facts.clue_rows)
    folds = min(n_folds, present.size)
    if folds < 2:
        raise TrainingError("cross-validation needs at least two clues")
    fold_of = np.full(facts.clue_rows.size, -1, dtype=np.int64)
    fold_of[present] = clue_folds(facts.clue_rows[present], folds)
    chosen = sample_clues(facts.clue_rows, sample_rows)
    if chosen.size < 2:
        raise TrainingError(
            f"a sample of at most {sample_rows:,} rows holds {chosen.size} whole clue(s); the "
            "calibration and thresholds need at least two: raise the sample's rows "
            f"(--sample-rows; a clue has up to {int(facts.clue_rows.max()):,} rows here)"
        )
    cv = cross_validated_fit(runner, blocks, fold_of, folds, est.Cs, progress=progress)
    sample = as_table(gather(runner, blocks, len(names), chosen), pre, names)
    raw = np.zeros(sample.y.size)
    row_fold = fold_of[sample.clue_id]
    for f, fit in enumerate(cv.fold_fits):
        test = row_fold == f
        if test.any():
            raw[test] = positive_proba(fit.pipeline(), sample.X[test])
    y = sample.y.astype(np.int64)
    methods = ("none", "platt", "isotonic") if calibration == "auto" else (calibration,)
    method, scores, est.oof_proba_ = cross_calibrate(raw, y, sample.clue_id, n_folds, methods)
    est.model_ = LinearModel(
        feature_names=list(names),
        mean=cv.final.mean,
        scale=cv.final.scale,
        coef=cv.final.coef,
        intercept=cv.final.intercept,
        calibrator=fit_calibrator(method, raw, y),
        C=cv.C,
        cv_log_loss=cv.cv_log_loss,
        calibration_log_loss=scores,
    )
    est.classes_ = LinearModel.classes_
    est.C_, est.cv_log_loss_, est.calibration_scores_ = cv.C, cv.cv_log_loss, scores
    est.feature_names_ = list(names)
    est.fit_choice_, est.fitted_in_blocks_ = choice, True
    sampled = (
        f"; calibration, presence model, thresholds and held-out figures on {chosen.size:,} of "
        f"{present.size:,} clues ({sample.y.size:,} of {facts.rows:,} rows)"
    )
    record = {
        **choice.to_dict(),
        "reason": choice.reason + sampled,
        "engine": "blocks on the cluster" if runner.ray is not None else "blocks in process",
        "blocks": facts.blocks,
        "passes": cv.passes,
        "rows": facts.rows,
        # The most table rows the driver held at once: the sample's.
        "driver_rows": int(sample.y.size),
        "sample": {
            "clues": int(chosen.size),
            "of_clues": int(present.size),
            "rows": int(sample.y.size),
            "of_rows": facts.rows,
            "cap_rows": int(sample_rows),
            "used_for": "calibration, presence model, decision thresholds, held-out metrics",
        },
    }
    return OutOfCoreFit(est, sample, facts, record)


@dataclass
class ClusterFit:
    """What training on the cluster produced: the table the driver holds (all of it, or the
    sample), the fitted estimator, the whole table's counts and the model file's `fit`."""

    table: TrainingTable
    estimator: Reranker
    rows: int
    positives: int
    recall: float
    record: dict[str, Any]


def fit_on_cluster(
    runner: Runner,
    index: Any,
    pre: Prefixes,
    registry: Any,
    names: list[str],
    *,
    k: int,
    metadata: Any,
    policy: Any,
    policies: Sequence[Any] | None,
    calibration: str,
    progress: bool,
    fit: str,
    fit_budget: int | None,
    sample_rows: int = SAMPLE_ROWS,
) -> ClusterFit:
    """Build the table's blocks on the cluster, count them, then fit: gathered for
    scikit-learn when the table fits the budget (or `fit` is 'memory'), else out of core."""
    blocks = row_blocks(runner, index, pre, registry, names, k, metadata, policy, policies)
    all_names = list(names) + metadata.names
    facts = table_facts(runner, blocks, pre.n_clues)
    choice = choose_fit(fit, facts.rows, len(all_names), fit_budget)
    if choice.method == "memory":
        table = as_table(gather(runner, blocks, len(all_names)), pre, all_names)
        del blocks  # the cluster's copies go
        est = Reranker(
            calibration=calibration,
            verbose=progress,
            fit=fit,
            runner=runner,
            fit_budget=choice.budget_bytes,
        ).fit(table.X, table.y, table.clue_id, table.feature_names)
        record = {**est.fit_choice_.to_dict(), "driver_rows": int(table.y.size)}
        return ClusterFit(table, est, int(table.y.size), int(table.y.sum()), table.recall(), record)
    got = fit_out_of_core(
        runner, blocks, pre, all_names, choice, facts, calibration=calibration,
        sample_rows=sample_rows, progress=progress,
    )  # fmt: skip
    return ClusterFit(
        got.sample, got.estimator, facts.rows, facts.positives, facts.recall, got.record
    )
