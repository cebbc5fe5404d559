"""Read labelled logs: the training form ({clue, answer}) and served + feedback lines."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import LabelledLogError


@dataclass(frozen=True)
class LabelledClue:
    """One clue and its gold answer as written (id, title or alias; None = none of these)."""

    clue: str
    answer: str | None
    metadata: dict[str, Any]
    file: str
    line: int
    served: tuple[str, ...] = ()  # ids the service showed, for feedback of "none of these"


@dataclass
class LogReport:
    """Counts from reading logs, including what was skipped and why."""

    lines: int = 0
    labelled: int = 0
    served: int = 0
    feedback: int = 0
    served_without_feedback: int = 0
    feedback_without_served: int = 0
    skipped: int = 0
    problems: list[str] = field(default_factory=list)
    checksum: str = ""

    def note(self, error: LabelledLogError) -> None:
        """Record one skipped bad line (keeps the first few messages)."""
        self.skipped += 1
        if len(self.problems) < 20:
            self.problems.append(str(error))


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


def _parse(rec: Any, where: dict[str, Any]) -> tuple[str, Any]:
    if not isinstance(rec, dict):
        raise LabelledLogError("each line must be a JSON object", **where)
    kind = rec.get("kind")
    if kind == "served":
        _check_str(rec, "request_id", where)
        _check_str(rec, "clue", where)
        cands = rec.get("candidates", [])
        if not isinstance(cands, list):
            raise LabelledLogError("must be a list", field="candidates", **where)
        return "served", rec
    if kind == "feedback":
        _check_str(rec, "request_id", where)
        if "answer" not in rec:
            raise LabelledLogError(
                "is required (an article id, or null for none of these)", field="answer", **where
            )
        _check_str(rec, "answer", where, nullable=True)
        return "feedback", rec
    if kind not in (None, "labelled"):
        raise LabelledLogError(
            f"unknown kind {kind!r}; expected 'served', 'feedback' or none", field="kind", **where
        )
    clue = _check_str(rec, "clue", where)
    answer = _check_str(rec, "answer", where)
    meta = rec.get("metadata", {}) or {}
    if not isinstance(meta, dict):
        raise LabelledLogError("must be an object", field="metadata", **where)
    return "labelled", LabelledClue(str(clue), answer, meta, where["file"], where["line"])


def read_logs(
    paths: Sequence[str | Path], *, skip_bad: bool = False, report: LogReport | None = None
) -> list[LabelledClue]:
    """Labelled clues from several logs; served lines joined with their feedback by request id."""
    report = report if report is not None else LogReport()
    digest = hashlib.sha256()
    out: list[LabelledClue] = []
    served: dict[str, tuple[dict[str, Any], str, int]] = {}
    feedback: dict[str, Any] = {}
    for path in paths:
        path = Path(path)
        if not path.exists():
            raise LabelledLogError("file not found", file=str(path))
        with open(path, "rb") as fh:
            for n, raw in enumerate(fh, 1):
                digest.update(raw)
                where: dict[str, Any] = {"file": str(path), "line": n}
                try:
                    text = raw.decode("utf-8")
                    if not text.strip():
                        continue
                    report.lines += 1
                    try:
                        rec = json.loads(text)
                    except json.JSONDecodeError as exc:
                        raise LabelledLogError(
                            f"malformed JSON: {exc.msg} (column {exc.colno})", **where
                        ) from exc
                    kind, item = _parse(rec, where)
                except UnicodeDecodeError:
                    err = LabelledLogError("not valid UTF-8", **where)
                    if not skip_bad:
                        raise err from None
                    report.note(err)
                    continue
                except LabelledLogError as err:
                    if not skip_bad:
                        raise
                    report.note(err)
                    continue
                if kind == "labelled":
                    report.labelled += 1
                    out.append(item)
                elif kind == "served":
                    report.served += 1
                    served[item["request_id"]] = (item, str(path), n)
                else:
                    report.feedback += 1
                    feedback[item["request_id"]] = item["answer"]  # the last word on a request wins
    for rid, (rec, file, line) in served.items():
        if rid not in feedback:
            report.served_without_feedback += 1
            continue
        ids = tuple(str(c.get("id")) for c in rec.get("candidates", []) if isinstance(c, dict))
        meta = rec.get("metadata") or {}
        out.append(
            LabelledClue(
                rec["clue"], feedback[rid], meta if isinstance(meta, dict) else {}, file, line, ids
            )
        )
    report.feedback_without_served = sum(1 for rid in feedback if rid not in served)
    report.checksum = digest.hexdigest()
    return out


def write_labelled(path: str | Path, clues: Iterable[LabelledClue]) -> None:
    """Write clues in the training form, through a temporary file and a rename."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        for c in clues:
            fh.write(
                json.dumps(
                    {"clue": c.clue, "answer": c.answer, "metadata": c.metadata}, ensure_ascii=False
                )
                + "\n"
            )
    tmp.replace(path)
