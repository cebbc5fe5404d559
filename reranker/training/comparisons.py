"""How each figure of an evaluation was obtained, and warnings wherever the model loses.

A report that puts the saved model beside baselines and ablation rows must say how each was
fitted: the saved model was fitted on its training logs and is only scored here, while the
"retrieval score alone" baseline and every ablation row are refit by grouped cross-validation
on the evaluated clues themselves. `fitting_notes` says so in words; `warnings` names every
comparison the model loses (top-1, clue-level log-loss, and for the baselines the
candidate-level log-loss) with both figures rounded for people.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np

from ..loading import ServedModel
from . import measures as M
from .table import TrainingTable

SCORE_ALONE = "retrieval score alone"
ALL_WRONG = "every candidate is wrong"
MODEL = "the model"

# (key, what people call it, higher is better)
METRICS = {
    "top1": ("top-1 accuracy", True),
    "clue_log_loss": ("clue-level log-loss", False),
    "log_loss": ("candidate-level log-loss", False),
}


def fitting_notes(*, n_folds: int, C: float, version: str) -> dict[str, str]:
    """One sentence per row kind of the report: what it was fitted on, and how."""
    refit = f"refit by {n_folds}-fold cross-validation grouped by clue on the evaluated clues"
    return {
        MODEL: f"the saved model as trained (version {version}), not refit: fitted on its "
        "training logs and only scored here. Clue-level figures use its one distribution per "
        "clue, candidate-level figures its pointwise probabilities.",
        SCORE_ALONE: "top-1 and MRR: the retriever's own BM25 order, nothing fitted. "
        f"Log-losses: a logistic regression on the BM25 score alone, {refit} (C chosen by the "
        "same folds, no calibration); it has seen the labels of the other folds of these "
        "clues, which the saved model has not.",
        ALL_WRONG: "nothing fitted but one number: every candidate gets the evaluated rows' "
        "own share of right answers (so it knows the evaluated base rate); it has no order, "
        "so no top-1.",
        "ablation": f"every row, 'full model' included, is a logistic regression on its "
        f"feature groups, {refit}, with the saved model's C ({C:g}) and no calibration, scored "
        "on its pointwise probabilities. 'full model' here is therefore not the saved model and "
        "its figures differ from the saved model's; compare the rows with one another.",
    }


def _pair(a: float, b: float) -> tuple[str, str]:
    """Both figures with 3 decimals, or as many more (up to 6) as it takes to tell them apart."""
    for digits in range(3, 7):
        sa, sb = f"{a:.{digits}f}", f"{b:.{digits}f}"
        if sa != sb:
            break
    return sa, sb


def _loses(model: float | None, other: float | None, higher_is_better: bool) -> bool:
    if model is None or other is None:
        return False
    return model < other if higher_is_better else model > other


def _message(
    subject: str, other: str, key: str, model: float, value: float, n_clues: int | None
) -> str:
    label, higher = METRICS[key]
    a, b = _pair(model, value)
    detail = "lower is better" if not higher else ""
    if key == "top1" and n_clues:
        fewer = round((value - model) * n_clues)
        detail = f"{fewer} fewer of {n_clues} clues right first" if fewer else ""
    tail = f" ({detail})" if detail else ""
    return f"{subject} loses to {other} on {label}: {a} against {b}{tail}"


def model_losses(
    baselines: Sequence[Mapping[str, Any]],
    ablation_rows: Sequence[Mapping[str, Any]],
    n_clues: int | None = None,
    subject: str = MODEL,
) -> list[dict[str, Any]]:
    """Every comparison the model loses, each as {message, metric, model, other, figures}.

    baselines: rows with a "name" (MODEL first, then SCORE_ALONE, ALL_WRONG) and figures under
    the keys of METRICS. Ablation rows are compared like with like: the 'full model' row with
    the score-only row and each group alone, on top-1 and clue-level log-loss, since all of
    them are refit the same way. subject: what the messages call the model.
    """
    out: list[dict[str, Any]] = []

    def add(subject: str, other: str, key: str, mine: Any, theirs: Any) -> None:
        if _loses(mine, theirs, METRICS[key][1]):
            out.append(
                {
                    "message": _message(subject, other, key, mine, theirs, n_clues),
                    "metric": key,
                    "model": subject,
                    "other": other,
                    "model_value": mine,
                    "other_value": theirs,
                }
            )

    model = next((b for b in baselines if b.get("name") == MODEL), None)
    if model is not None:
        for base in baselines:
            if base is model:
                continue
            for key in METRICS:
                add(subject, f"the baseline '{base['name']}'", key, model.get(key), base.get(key))
    full = next((r for r in ablation_rows if r.get("kind") == "full"), None)
    if full is not None:
        subject = "the full feature set (ablation, refit on the evaluated clues)"
        for row in ablation_rows:
            if row.get("kind") in ("baseline", "alone"):
                for key in ("top1", "clue_log_loss"):
                    add(subject, f"'{row['name']}'", key, full.get(key), row.get(key))
    return out


def same_logs_warning(training_checksum: str, evaluated_checksum: str) -> dict[str, Any] | None:
    """A warning when the evaluated logs are byte for byte the ones the model was trained on."""
    if not training_checksum or training_checksum != evaluated_checksum:
        return None
    return {
        "message": "the evaluated logs are the ones the model was trained on (same checksum): "
        "every figure of the model flatters it",
        "metric": "data",
        "model": MODEL,
        "other": "training logs",
        "model_value": None,
        "other_value": None,
    }


def about(
    model: ServedModel,
    groups: dict[str, list[str]],
    data: dict[str, Any],
    notes: dict[str, str],
    n_folds: int,
) -> dict[str, Any]:
    """The report's header: what the model was trained on, what was evaluated, how rows were fit."""
    art = model.artifact
    training = art.get("training", {})
    return {
        "model": {
            "version": model.version,
            "trained_at": art.get("created_at"),
            "training_logs": list(training.get("logs") or []),
            "training_clues": training.get("clues"),
            "k": model.k,
            "feature_groups": {g: list(names) for g, names in groups.items()},
            "features": len(model.feature_names),
            "calibration": (art.get("calibration") or {}).get("method"),
            "C": model.model.C_,
            "candidates": model.candidates.to_dict(),
        },
        "evaluation": {
            "logs": data["logs"],
            "clues": data["clues"],
            "candidate_rows": data["candidate_rows"],
            "evaluated_at": datetime.now(UTC).isoformat(timespec="seconds"),
            "index_version": data["index_version"],
            "folds": n_folds,
        },
        "fitting": notes,
    }


def baselines(
    table: TrainingTable,
    bm25_only: np.ndarray,
    clue: dict[str, Any],
    candidate: dict[str, Any],
    notes: dict[str, str],
) -> list[dict[str, Any]]:
    """The model and the two baselines on the figures the warnings compare, with how each was fit.

    Clue-level log-loss of a baseline is of its pointwise probabilities per clue (the remainder
    to 1 is its "none of these" share), as `measures.clue_log_loss` defines it.
    """
    full = table.fraction == 1.0
    g, y = table.group[full], table.y[full]
    rate = np.full(int(full.sum()), float(table.y.mean()))
    return [
        {
            "name": MODEL,
            "top1": clue["top1_reranked"],
            "mrr": clue["mrr_reranked"],
            "clue_log_loss": clue["clue_log_loss"],
            "log_loss": candidate["model"]["log_loss"],
            "fitted": notes[MODEL],
        },
        {
            "name": SCORE_ALONE,
            "top1": clue["top1_bm25"],
            "mrr": clue["mrr_bm25"],
            "clue_log_loss": M.clue_log_loss(g, y, bm25_only[full]),
            "log_loss": candidate["bm25_only"]["log_loss"],
            "fitted": notes[SCORE_ALONE],
        },
        {
            "name": ALL_WRONG,
            "top1": None,
            "mrr": None,
            "clue_log_loss": M.clue_log_loss(g, y, rate),
            "log_loss": candidate["all_wrong"]["log_loss"],
            "fitted": notes[ALL_WRONG],
        },
    ]


def training_losses(
    table: TrainingTable, clue: Mapping[str, Any], candidate_log_loss: float
) -> list[dict[str, Any]]:
    """What training can check without another fit: its held-out (out-of-fold) figures against
    the BM25 order's top-1 and the every-candidate-wrong forecast's log-losses.

    clue: the out-of-fold clue metrics of the whole clues (`measures.clue_metrics`).
    """
    full = table.fraction == 1.0
    rate = float(table.y.mean())
    rows = [
        {
            "name": MODEL,
            "top1": clue.get("top1_reranked"),
            "clue_log_loss": clue.get("clue_log_loss"),
            "log_loss": candidate_log_loss,
        },
        {"name": f"{SCORE_ALONE} (BM25 order)", "top1": clue.get("top1_bm25")},
        {
            "name": ALL_WRONG,
            "clue_log_loss": M.clue_log_loss(
                table.group[full], table.y[full], np.full(int(full.sum()), rate)
            ),
            "log_loss": M.baseline_all_wrong(table.y)["log_loss"],
        },
    ]
    subject = "the model (on held-out folds of its training clues)"
    return model_losses(rows, [], n_clues=clue.get("n_clues"), subject=subject)
