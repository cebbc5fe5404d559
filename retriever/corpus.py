"""Read and validate corpus articles from JSON Lines, CSV/TSV or Parquet."""

from __future__ import annotations

import csv
import gzip
import hashlib
import io
import json
import math
import re
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import JSON_ARRAY, RECORDS, CorpusError, position

_QUALIFIED = re.compile(r"^(?P<base>.*?\S)\s*\((?P<qualifier>[^()]+)\)\s*$")
FORMATS = ("jsonl", "csv", "tsv", "parquet")


@dataclass(frozen=True)
class Article:
    """One validated corpus entry."""

    id: str
    title: str
    text: str
    links: tuple[str, ...] = ()
    aliases: tuple[str, ...] = ()
    popularity: float | None = None
    metadata: dict[str, Any] = field(default_factory=dict)

    @property
    def base(self) -> str:
        """Title without its parenthetical qualifier."""
        return split_title(self.title)[0]

    @property
    def qualifier(self) -> str:
        """The parenthetical qualifier of the title, or '' when there is none."""
        return split_title(self.title)[1]

    def to_record(self) -> dict[str, Any]:
        """Plain-JSON form, in the corpus file's own shape."""
        return {
            "id": self.id,
            "title": self.title,
            "text": self.text,
            "links": list(self.links),
            "aliases": list(self.aliases),
            "popularity": self.popularity,
            "metadata": self.metadata,
        }


def split_title(title: str) -> tuple[str, str]:
    """Split 'Name (qualifier)' into ('Name', 'qualifier'); ('Name', '') when unqualified."""
    m = _QUALIFIED.match(title)
    if m is None:
        return title.strip(), ""
    return m.group("base").strip(), m.group("qualifier").strip()


def normalize_title(title: str) -> str:
    """Loose form of a title for matching: case-folded, whitespace collapsed."""
    return " ".join(title.casefold().replace("_", " ").split())


def detect_format(path: Path) -> str:
    """Corpus format from the file name (.jsonl, .ndjson, .csv, .tsv, .parquet, optionally .gz)."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    ext = suffixes[-1] if suffixes else ""
    mapping = {
        ".jsonl": "jsonl",
        ".ndjson": "jsonl",
        ".json": "jsonl",
        ".csv": "csv",
        ".tsv": "tsv",
        ".parquet": "parquet",
    }
    if ext not in mapping:
        raise CorpusError(
            "cannot tell the format from the name; use .jsonl, .csv, .tsv or .parquet "
            f"(got {ext or 'no extension'!r})",
            file=str(path),
        )
    return mapping[ext]


def _str_list(value: Any, name: str, where: dict[str, Any]) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):  # CSV cells: JSON array or '|'-separated
        text = value.strip()
        if not text:
            return ()
        if text.startswith("["):
            try:
                value = json.loads(text)
            except json.JSONDecodeError as exc:
                raise CorpusError(f"not a JSON list: {exc.msg}", field=name, **where) from exc
        else:
            return tuple(p.strip() for p in text.split("|") if p.strip())
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise CorpusError("must be a list of strings", field=name, **where)
    return tuple(value)


def validate_record(record: Any, *, file: str = "", line: int = 0) -> Article:
    """Check one raw record and turn it into an Article, or raise CorpusError."""
    where: dict[str, Any] = {"file": file, "line": line}
    if not isinstance(record, Mapping):
        raise CorpusError("each record must be a JSON object", **where)
    for name in ("id", "title", "text"):
        if name not in record or record[name] is None:
            raise CorpusError("is required", field=name, **where)
        if not isinstance(record[name], str):
            raise CorpusError(
                f"must be a string, got {type(record[name]).__name__}", field=name, **where
            )
    if not record["id"].strip():
        raise CorpusError("must not be empty", field="id", **where)
    if not record["title"].strip():
        raise CorpusError("must not be empty", field="title", **where)
    popularity = record.get("popularity")
    if isinstance(popularity, str):  # CSV cell
        try:
            popularity = float(popularity) if popularity.strip() else None
        except ValueError as exc:
            raise CorpusError(
                f"must be a number, got {popularity!r}", field="popularity", **where
            ) from exc
    if popularity is not None:
        if isinstance(popularity, bool) or not isinstance(popularity, int | float):
            raise CorpusError("must be a number", field="popularity", **where)
        if not math.isfinite(popularity) or popularity < 0:
            raise CorpusError(
                f"must be a finite number >= 0, got {popularity}", field="popularity", **where
            )
        popularity = float(popularity)
    metadata = record.get("metadata")
    if isinstance(metadata, str):  # CSV cell
        try:
            metadata = json.loads(metadata) if metadata.strip() else None
        except json.JSONDecodeError as exc:
            raise CorpusError(f"not a JSON object: {exc.msg}", field="metadata", **where) from exc
    if metadata is None:
        metadata = {}
    if not isinstance(metadata, dict):
        raise CorpusError("must be an object", field="metadata", **where)
    return Article(
        id=record["id"],
        title=record["title"].strip(),
        text=record["text"],
        links=_str_list(record.get("links"), "links", where),
        aliases=_str_list(record.get("aliases"), "aliases", where),
        popularity=popularity,
        metadata=metadata,
    )


def _open_text(path: Path) -> io.TextIOBase:
    raw = gzip.open(path, "rb") if path.suffix.lower() == ".gz" else open(path, "rb")  # noqa: SIM115
    # surrogateescape keeps reading past bad bytes so the bad row alone can be reported.
    return io.TextIOWrapper(raw, encoding="utf-8", errors="surrogateescape", newline="")


# Raw readers yield (line, record) or (line, CorpusError) so that --skip-bad can go on
# after a line that does not even parse.
RawItem = tuple[int, Any]


def _raw_jsonl(path: Path) -> Iterator[RawItem]:
    opener = gzip.open if path.suffix.lower() == ".gz" else open
    first = True
    with opener(path, "rb") as fh:
        for n, raw in enumerate(fh, 1):
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                msg = f"not valid UTF-8 ({exc.reason} at byte {exc.start})"
                yield n, CorpusError(msg, file=str(path), line=n)
                continue
            if not text.strip():
                continue
            if first and text.lstrip().startswith("["):
                # One JSON array (often a .json file): say so once, not once per line.
                yield n, CorpusError(JSON_ARRAY, file=str(path), line=n)
                return
            first = False
            try:
                record = json.loads(text)
            except json.JSONDecodeError as exc:
                msg = f"malformed JSON: {exc.msg} (column {exc.colno})"
                yield n, CorpusError(msg, file=str(path), line=n)
                continue
            yield n, record


def _bad_cell(row: dict[str, str]) -> str | None:
    for key, value in row.items():
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            return key
    return None


def _raw_delimited(path: Path, delimiter: str) -> Iterator[RawItem]:
    fh = _open_text(path)
    with fh:
        reader = csv.DictReader(fh, delimiter=delimiter)
        header = reader.fieldnames
        if not header:
            raise CorpusError(
                "empty file: expected a header row with id,title,text", file=str(path), line=1
            )
        if any(_bad_cell({h: h}) for h in header):
            raise CorpusError("the header row is not valid UTF-8", file=str(path), line=1)
        while True:
            start = reader.line_num + 1
            try:
                row = next(reader)
            except StopIteration:
                return
            except csv.Error as exc:
                yield start, CorpusError(f"malformed row: {exc}", file=str(path), line=start)
                continue
            if None in row:
                msg = "row has more cells than the header"
                yield start, CorpusError(msg, file=str(path), line=start)
                continue
            # DictReader fills the cells a short row lacks with None (its restval).
            missing = [k for k, v in row.items() if v is None]
            if missing:
                msg = (
                    f"row has {len(header) - len(missing)} cells but the header has "
                    f"{len(header)}; missing {', '.join(repr(k) for k in missing)}"
                )
                yield start, CorpusError(msg, file=str(path), line=start)
                continue
            # An empty cell is an absent optional field, but an empty text is a text.
            cells = {k: v for k, v in row.items() if v or k in ("id", "title", "text")}
            bad = _bad_cell(cells)
            if bad is not None:
                msg = "not valid UTF-8"
                yield start, CorpusError(msg, file=str(path), line=start, field=bad)
                continue
            yield start, cells


def _raw_parquet(path: Path) -> Iterator[tuple[int, Any]]:
    try:
        import pyarrow.parquet as pq
    except ImportError as exc:
        raise CorpusError(
            "reading Parquet needs pyarrow: pip install 'hunchwise[parquet]'", file=str(path)
        ) from exc
    try:
        table = pq.read_table(path)
    except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
        raise CorpusError(f"not a readable Parquet file ({exc})", file=str(path)) from exc
    yield from enumerate(table.to_pylist(), 1)


def iter_raw(path: Path, fmt: str | None = None) -> Iterator[tuple[int, Any]]:
    """(line, raw record) pairs of a corpus file; unparsable lines come as (line, CorpusError)."""
    if not path.exists():
        raise CorpusError("file not found", file=str(path))
    fmt = fmt or detect_format(path)
    if fmt == "jsonl":
        return _raw_jsonl(path)
    if fmt == "csv":
        return _raw_delimited(path, ",")
    if fmt == "tsv":
        return _raw_delimited(path, "\t")
    if fmt == "parquet":
        return _raw_parquet(path)
    raise CorpusError(f"unknown format {fmt!r}; use one of {FORMATS}", file=str(path))


@dataclass
class ReadReport:
    """What reading a corpus found: how many articles, and which lines were skipped."""

    articles: int = 0
    skipped: int = 0
    problems: list[str] = field(default_factory=list)

    def note(self, error: CorpusError) -> None:
        """Record one skipped bad line (keeps the first few messages)."""
        self.skipped += 1
        if len(self.problems) < 20:
            self.problems.append(str(error))


def read_articles(
    source: str | Path | Iterable[Mapping[str, Any] | Article],
    *,
    skip_bad: bool = False,
    report: ReadReport | None = None,
    fmt: str | None = None,
) -> Iterator[Article]:
    """Yield validated articles; duplicate ids or titles are errors like any other bad line."""
    report = report if report is not None else ReadReport()
    if isinstance(source, str | Path):
        path = Path(source)
        file = str(path)
        raw: Iterable[tuple[int, Any]] = iter_raw(path, fmt)
    else:
        file = RECORDS
        raw = enumerate(source, 1)
    seen_ids: dict[str, int] = {}
    seen_titles: dict[str, int] = {}
    for line, rec in raw:
        try:
            if isinstance(rec, CorpusError):
                raise rec
            art = rec if isinstance(rec, Article) else validate_record(rec, file=file, line=line)
            if art.id in seen_ids:
                raise CorpusError(
                    f"duplicate id {art.id!r} (first seen on {position(file, seen_ids[art.id])})",
                    file=file,
                    line=line,
                    field="id",
                )
            if art.title in seen_titles:
                raise CorpusError(
                    f"duplicate title {art.title!r} "
                    f"(first seen on {position(file, seen_titles[art.title])})",
                    file=file,
                    line=line,
                    field="title",
                )
        except CorpusError as exc:
            if not skip_bad:
                raise
            report.note(exc)
            continue
        seen_ids[art.id] = line
        seen_titles[art.title] = line
        report.articles += 1
        yield art


def file_checksum(path: str | Path) -> str:
    """sha256 of a file's bytes, as hex."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
