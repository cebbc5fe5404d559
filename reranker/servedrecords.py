"""The served log's format, in one place: its files, and the records the service writes.

The service writes these records (api/servedlog.py appends them) and training reads them back
(reranker/training/logs.py): both take the names, the builders and the checks from here.

A log folder holds
- served.jsonl, then served.1.jsonl (newest) ... served.N.jsonl: one "served" line per
  ranked clue, rotated by size, the oldest dropped;
- feedback.jsonl: one "feedback" line per label, never rotated, so labels outlive the
  served lines' retention window (a label whose served line rotated away is counted, and
  its clue cannot be rebuilt: keep served files for as long as labels arrive).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from .errors import LabelledLogError
from .ranking import Ranking

SERVED = "served.jsonl"
FEEDBACK = "feedback.jsonl"
SERVED_KEYS = (
    "kind", "request_id", "time", "clue", "k", "model_k", "complete", "index_version",
    "model_version", "in_candidates", "candidates", "decision",
)  # fmt: skip


def rotated_name(n: int) -> str:
    """File name of the n-th rotated served file (1 is the newest)."""
    return f"served.{n}.jsonl"


def log_files(folder: str | Path) -> list[Path]:
    """A log folder's files in reading order: served files oldest first, then feedback."""
    folder = Path(folder)
    rotated = sorted(
        (p for p in folder.glob("served.*.jsonl") if p.name.split(".")[1].isdigit()),
        key=lambda p: -int(p.name.split(".")[1]),
    )
    return [p for p in [*rotated, folder / SERVED, folder / FEEDBACK] if p.exists()]


def _finite(value: float) -> float | None:
    # JSON has no NaN or infinity; a feature that produced one is logged as null.
    return value if value == value and value not in (float("inf"), float("-inf")) else None


def served_record(
    request_id: str,
    r: Ranking,
    k: int,
    complete: bool,
    when: str,
    metadata: dict[str, Any] | None,
    *,
    features: bool = False,
) -> dict[str, Any]:
    """One "served" line. Features are logged only when asked (training recomputes them)."""
    d = r.decision
    candidates = []
    for c in r.candidates:
        item: dict[str, Any] = {
            "id": c.doc_id,
            "title": c.title,
            "score": c.score,
            "rank": c.rank,
            "probability": c.probability,
            "pointwise": c.pointwise,
        }
        if features:
            item["features"] = {n: _finite(v) for n, v in c.features.items()}
        candidates.append(item)
    record: dict[str, Any] = {
        "kind": "served",
        "request_id": request_id,
        "time": when,
        "clue": r.clue,
        "k": k,
        "model_k": r.model_k,
        "complete": complete,
        "index_version": r.index_version,
        "model_version": r.model_version,
        "in_candidates": r.in_candidates,
        "candidates": candidates,
        "decision": {
            "action": d.action,
            "id": d.doc_id,
            "probability": d.probability,
            "threshold": d.threshold,
            "reason": d.reason,
        },
    }
    if metadata:
        record["metadata"] = metadata
    return record


def feedback_record(request_id: str, answer: str | None, when: str) -> dict[str, Any]:
    """One "feedback" line: the right article's id, or None for "none of these"."""
    return {"kind": "feedback", "request_id": request_id, "time": when, "answer": answer}


def _check_str(
    rec: dict[str, Any], name: str, where: dict[str, Any], *, nullable: bool = False
) -> str | None:
    if name not in rec:
        raise LabelledLogError("is required", field=name, **where)
    value = rec[name]
    if value is None and nullable:
        return None
    if not isinstance(value, str):
        raise LabelledLogError(f"must be a string, got {type(value).__name__}", field=name, **where)
    if not value.strip():
        raise LabelledLogError("must not be empty", field=name, **where)
    return value


def check_record(rec: Any, where: dict[str, Any]) -> str:
    """The kind of a log line ("served", "feedback" or "labelled"), after checking its fields."""
    if not isinstance(rec, dict):
        raise LabelledLogError("each line must be a JSON object", **where)
    kind = rec.get("kind")
    if kind == "served":
        _check_str(rec, "request_id", where)
        _check_str(rec, "clue", where)
        if not isinstance(rec.get("candidates", []), list):
            raise LabelledLogError("must be a list", field="candidates", **where)
        return "served"
    if kind == "feedback":
        _check_str(rec, "request_id", where)
        if "answer" not in rec:
            raise LabelledLogError(
                "is required (an article id, or null for none of these)", field="answer", **where
            )
        _check_str(rec, "answer", where, nullable=True)
        return "feedback"
    if kind not in (None, "labelled"):
        raise LabelledLogError(
            f"unknown kind {kind!r}; expected 'served', 'feedback' or none", field="kind", **where
        )
    _check_str(rec, "clue", where)
    _check_str(rec, "answer", where)
    if not isinstance(rec.get("metadata", {}) or {}, dict):
        raise LabelledLogError("must be an object", field="metadata", **where)
    return "labelled"
