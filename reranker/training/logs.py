"""Read labelled logs: the training form ({clue, answer}) and served + feedback lines."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from retriever import atomicfile

from ..errors import LabelledLogError
from ..servedrecords import (
    FEEDBACK,
    SERVED,
    ServedLine,
    check_record,
    feedback_from,
    log_files,
    served_from,
)


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
    torn_lines: int = 0  # unfinished last lines (no newline, not JSON), skipped
    problems: list[str] = field(default_factory=list)
    checksum: str = ""

    def note(self, error: LabelledLogError) -> None:
        """Record one skipped bad line (keeps the first few messages)."""
        self.skipped += 1
        if len(self.problems) < 20:
            self.problems.append(str(error))


def _parse(rec: Any, where: dict[str, Any]) -> tuple[str, Any]:
    kind = check_record(rec, where)
    if kind == "served":
        return kind, served_from(rec, where)
    if kind == "feedback":
        return kind, feedback_from(rec)
    meta = rec.get("metadata", {}) or {}
    return "labelled", LabelledClue(
        str(rec["clue"]), rec["answer"], meta, where["file"], where["line"]
    )


def expand_paths(paths: Sequence[str | Path]) -> list[Path]:
    """Files to read: a log folder stands for its files (served, rotated ones, feedback)."""
    out: list[Path] = []
    for path in map(Path, paths):
        if path.is_dir():
            files = log_files(path)
            if not files:
                raise LabelledLogError(f"no {SERVED} or {FEEDBACK} in this folder", file=str(path))
            out.extend(files)
        else:
            out.append(path)
    return out


def read_logs(
    paths: Sequence[str | Path], *, skip_bad: bool = False, report: LogReport | None = None
) -> list[LabelledClue]:
    """Labelled clues from several logs; served lines joined with their feedback by request id.

    A path may be a served-log folder (its served files and its feedback file). A last line
    with no newline that is not valid JSON is a write the service did not finish (a crash or
    a full disk): it is skipped and counted (`torn_lines`), not an error.
    """
    report = report if report is not None else LogReport()
    digest = hashlib.sha256()
    out: list[LabelledClue] = []
    served: dict[str, tuple[ServedLine, str, int]] = {}
    feedback: dict[str, Any] = {}
    for path in expand_paths(paths):
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
                        if not raw.endswith(b"\n") and not fh.peek(1):
                            report.torn_lines += 1  # an unfinished last write
                            continue
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
                    served[item.request_id] = (item, str(path), n)
                else:
                    report.feedback += 1
                    feedback[item.request_id] = item.answer  # the last word on a request wins
    for rid, (rec, file, line) in served.items():
        if rid not in feedback:
            report.served_without_feedback += 1
            continue
        out.append(LabelledClue(rec.clue, feedback[rid], rec.metadata, file, line, rec.ids))
    report.feedback_without_served = sum(1 for rid in feedback if rid not in served)
    report.checksum = digest.hexdigest()
    return out


def write_labelled(path: str | Path, clues: Iterable[LabelledClue]) -> None:
    """Write clues in the training form, through a temporary file and a rename."""
    with atomicfile.replacing(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        for c in clues:
            record = {"clue": c.clue, "answer": c.answer, "metadata": c.metadata}
            fh.write(json.dumps(record, ensure_ascii=False) + "\n")
