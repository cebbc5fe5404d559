"""Files of records for the command line: clues to read (JSON Lines, CSV) and rows to write
(JSON Lines, CSV, Parquet), each written to a temporary sibling and then renamed."""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from retriever.errors import located

WRITE_FORMATS = {".jsonl": "jsonl", ".ndjson": "jsonl", ".csv": "csv", ".parquet": "parquet"}


@dataclass(frozen=True)
class ClueIn:
    """One clue to rank, where it came from, and its optional id and metadata."""

    id: str
    clue: str
    metadata: dict[str, Any] | None
    line: int


def _bad(path: Path, line: int, field: str, message: str) -> ValueError:
    return ValueError(located(message, str(path), line, field))


def _clue(path: Path, line: int, rec: dict[str, Any], metadata: Any) -> ClueIn:
    """Check one record's fields (clue, id, metadata) and make it a ClueIn."""
    if "clue" not in rec:
        raise _bad(path, line, "clue", "missing")
    text = rec["clue"]
    if not isinstance(text, str):
        raise _bad(path, line, "clue", f"must be text, got {type(text).__name__}")
    if not text.strip():
        raise _bad(path, line, "clue", "empty clue")
    given = rec.get("id")
    if given is not None and (not isinstance(given, str | int) or isinstance(given, bool)):
        raise _bad(path, line, "id", f"must be text or a whole number, got {given!r}")
    if given is not None and not str(given).strip():
        raise _bad(path, line, "id", "empty id")
    if metadata is not None and not isinstance(metadata, dict):
        raise _bad(path, line, "metadata", "must be a JSON object")
    # Without an id a clue is named by its line, which says where to find it.
    return ClueIn(str(given) if given is not None else str(line), text, metadata, line)


def _jsonl(path: Path) -> Iterator[ClueIn]:
    with open(path, encoding="utf-8") as fh:
        for n, raw in enumerate(fh, 1):
            if not raw.strip():
                continue
            try:
                rec = json.loads(raw)
            except json.JSONDecodeError as exc:
                raise _bad(path, n, "", f"bad JSON: {exc.msg} (column {exc.colno})") from None
            if not isinstance(rec, dict):
                raise _bad(path, n, "", "each line must be a JSON object with a 'clue' field")
            yield _clue(path, n, rec, rec.get("metadata"))


def _csv(path: Path) -> Iterator[ClueIn]:
    with open(path, encoding="utf-8", newline="") as fh:
        reader = csv.DictReader(fh)
        if reader.fieldnames is None or "clue" not in reader.fieldnames:
            raise _bad(path, 1, "clue", "the header has no 'clue' column")
        for rec in reader:
            n = reader.line_num  # the line the record ends on (a quoted cell may span lines)
            cell = (rec.get("metadata") or "").strip()
            meta = None
            if cell:
                try:
                    meta = json.loads(cell)
                except json.JSONDecodeError as exc:
                    raise _bad(path, n, "metadata", f"bad JSON: {exc.msg}") from None
            if not (rec.get("id") or "").strip():
                rec.pop("id", None)
            yield _clue(path, n, rec, meta)


def read_clues(path: Path) -> list[ClueIn]:
    """Clues from JSON Lines (`clue`, optional `id` and `metadata` fields) or CSV (a `clue`
    column, optional `id` and `metadata` columns, the metadata a JSON object in its cell)."""
    if not path.is_file():
        raise ValueError(f"{path}: no such file")
    reader = _csv if path.suffix.lower() in (".csv", ".tsv") else _jsonl
    try:
        clues = list(reader(path))
    except UnicodeDecodeError as exc:
        raise ValueError(f"{path}: not UTF-8 text ({exc.reason})") from None
    seen: dict[str, int] = {}
    for c in clues:
        if c.id in seen:
            raise _bad(path, c.line, "id", f"{c.id!r} repeats the id of line {seen[c.id]}")
        seen[c.id] = c.line
    return clues


def output_format(path: Path, allowed: Iterable[str]) -> str:
    """The format a file name asks for, among `allowed` (jsonl, csv, parquet)."""
    fmt = WRITE_FORMATS.get(path.suffix.lower())
    allowed = list(allowed)
    if fmt not in allowed:
        names = ", ".join(s for s, f in WRITE_FORMATS.items() if f in allowed)
        raise ValueError(f"{path}: cannot tell the format from the name; end it in {names}")
    return fmt


def plain(value: Any) -> Any:
    """NaN and infinities as None: JSON has no such numbers."""
    return None if isinstance(value, float) and not math.isfinite(value) else value


def json_line(record: dict[str, Any]) -> str:
    """One record as a JSON line (floats in their shortest exact form)."""
    return json.dumps(record, ensure_ascii=False, allow_nan=False) + "\n"


def write_rows(path: Path, rows: Iterable[dict[str, Any]], fmt: str) -> int:
    """Write records to `path` in `fmt` through a temporary sibling; returns how many."""
    from retriever import atomicfile

    n = 0
    with atomicfile.replacing(path) as tmp:
        if fmt == "parquet":
            n = _parquet(tmp, rows)
        elif fmt == "csv":
            with open(tmp, "w", encoding="utf-8", newline="") as fh:
                writer: csv.DictWriter[str] | None = None
                for row in rows:
                    if writer is None:
                        writer = csv.DictWriter(fh, fieldnames=list(row))
                        writer.writeheader()
                    writer.writerow(row)  # floats as repr: they read back exactly
                    n += 1
        else:
            with open(tmp, "w", encoding="utf-8") as fh:
                for row in rows:
                    fh.write(json_line(row))
                    n += 1
    return n


def _parquet(tmp: Path, rows: Iterable[dict[str, Any]]) -> int:
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        needs = "writing Parquet needs pyarrow: pip install 'hunchwise[parquet]'"
        raise ValueError(needs) from None
    records = list(rows)
    pq.write_table(pa.Table.from_pylist(records), tmp)
    return len(records)
