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

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import LabelledLogError
from .ranking import Ranking

SERVED = "served.jsonl"
FEEDBACK = "feedback.jsonl"
# The keys of a served line ("metadata" and "filter" too when the request had them), of each of its
# candidates ("features" too when the service logs them), and of a feedback line.
SERVED_KEYS = (
    "kind", "request_id", "time", "clue", "k", "model_k", "complete", "index_version",
    "model_version", "in_candidates", "candidates", "decision",
)  # fmt: skip
CANDIDATE_KEYS = ("id", "title", "score", "rank", "probability", "pointwise")
FEEDBACK_KEYS = ("kind", "request_id", "time", "answer")


@dataclass(frozen=True)
class ServedCandidate:
    """One candidate of a served line, as read back."""

    id: str
    title: str | None = None
    score: float | None = None
    rank: int | None = None
    probability: float | None = None
    pointwise: float | None = None
    features: dict[str, float | None] | None = None


@dataclass(frozen=True)
class ServedLine:
    """A served line as read back. Only request_id, clue and candidates are required:
    older logs may lack the later fields (in_candidates, pointwise, model_k)."""

    request_id: str
    clue: str
    candidates: tuple[ServedCandidate, ...]
    metadata: dict[str, Any] = field(default_factory=dict)
    where: dict[str, Any] | None = None  # the metadata filter (absent from older logs)
    time: str | None = None
    k: int | None = None
    model_k: int | None = None
    complete: bool | None = None
    index_version: str | None = None
    model_version: str | None = None
    in_candidates: float | None = None
    decision: dict[str, Any] | None = None

    @property
    def ids(self) -> tuple[str, ...]:
        """The candidates' article ids, best first."""
        return tuple(c.id for c in self.candidates)


@dataclass(frozen=True)
class FeedbackLine:
    """A feedback line as read back: the right article's id, or None for none of these."""

    request_id: str
    answer: str | None
    time: str | None = None


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
    if r.where is not None:
        record["filter"] = r.where
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
        if not isinstance(rec.get("filter", {}), dict | None):
            raise LabelledLogError("must be an object or null", field="filter", **where)
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


# Fields read back as they were written (absent in older lines: None).
_CANDIDATE_AS_IS = ("title", "score", "rank", "probability", "pointwise")
_SERVED_AS_IS = (
    "time", "k", "model_k", "complete", "index_version", "model_version", "in_candidates"
)  # fmt: skip


def _candidate(item: Any, n: int, where: dict[str, Any]) -> ServedCandidate:
    if not isinstance(item, dict) or not isinstance(item.get("id"), str):
        raise LabelledLogError(
            "must be an object with a string 'id'", field=f"candidates[{n}]", **where
        )
    features = item.get("features")
    copied = {name: item.get(name) for name in _CANDIDATE_AS_IS}
    return ServedCandidate(
        id=item["id"], features=features if isinstance(features, dict) else None, **copied
    )


def parse_served(rec: Any, where: dict[str, Any]) -> ServedLine:
    """A served line's fields, checked; errors name the file, line and field."""
    if check_record(rec, where) != "served":
        raise LabelledLogError("expected a served line", field="kind", **where)
    return served_from(rec, where)


def served_from(rec: dict[str, Any], where: dict[str, Any]) -> ServedLine:
    """A served line's fields from a record check_record() has called "served"."""
    meta = rec.get("metadata") or {}
    decision = rec.get("decision")
    copied = {name: rec.get(name) for name in _SERVED_AS_IS}
    return ServedLine(
        request_id=rec["request_id"],
        clue=rec["clue"],
        candidates=tuple(_candidate(c, n, where) for n, c in enumerate(rec.get("candidates", []))),
        metadata=meta if isinstance(meta, dict) else {},
        where=rec.get("filter"),
        decision=decision if isinstance(decision, dict) else None,
        **copied,
    )


def parse_feedback(rec: Any, where: dict[str, Any]) -> FeedbackLine:
    """A feedback line's fields, checked; errors name the file, line and field."""
    if check_record(rec, where) != "feedback":
        raise LabelledLogError("expected a feedback line", field="kind", **where)
    return feedback_from(rec)


def feedback_from(rec: dict[str, Any]) -> FeedbackLine:
    """A feedback line's fields from a record check_record() has called "feedback"."""
    return FeedbackLine(rec["request_id"], rec["answer"], rec.get("time"))
