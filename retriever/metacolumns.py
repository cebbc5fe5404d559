"""The articles' metadata as typed columns in the index folder, for filtering.

Written at build time from the article store, so a query never parses the store: each
field becomes one .npy array, its type decided over the whole corpus.
- "string": int32 codes into the field's sorted list of values (-1: the article lacks it);
- "number": float64 (NaN: lacks it); booleans are not numbers here;
- "bool": int8, 1 true, 0 false, -1 lacks it;
- "mixed": values of more than one type, or lists and objects: listed, not filterable.
`meta_fields.json` lists the fields in order; field i's array is `meta_<i>.npy` (field
names may hold any character, so they stay out of file names). A folder written before
these columns existed has no meta_fields.json: filtering on it asks for a rebuild.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from . import atomicfile
from .errors import IndexFormatError

FIELDS_FILE = "meta_fields.json"
KINDS = ("string", "number", "bool", "mixed")


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return "bool"
    if isinstance(value, int | float):
        return "number" if math.isfinite(value) else "mixed"
    if isinstance(value, str):
        return "string"
    return "mixed"


def write_meta_columns(folder: Path, metadatas: Iterable[dict[str, Any]]) -> dict[str, str]:
    """Write the metadata columns of articles given in row order; returns field -> kind."""
    rows = list(metadatas)
    n = len(rows)
    kinds: dict[str, str] = {}
    for meta in rows:
        for name, value in meta.items():
            if value is None:
                continue  # null counts as "lacks the field"
            kind = _kind(value)
            seen = kinds.setdefault(name, kind)
            if seen != kind:
                kinds[name] = "mixed"
    fields = []
    for i, (name, kind) in enumerate(kinds.items()):
        entry: dict[str, Any] = {"name": name, "kind": kind}
        values = [meta.get(name) for meta in rows]
        if kind == "string":
            distinct = sorted({v for v in values if v is not None})
            code = {v: c for c, v in enumerate(distinct)}
            arr: np.ndarray | None = np.fromiter(
                (code.get(v, -1) if v is not None else -1 for v in values), np.int32, n
            )
            entry["values"] = distinct
        elif kind == "number":
            arr = np.fromiter((np.nan if v is None else float(v) for v in values), np.float64, n)
        elif kind == "bool":
            arr = np.fromiter((-1 if v is None else int(bool(v)) for v in values), np.int8, n)
        else:
            arr = None
        if arr is not None:
            np.save(folder / f"meta_{i}.npy", arr, allow_pickle=False)
        fields.append(entry)
    data = {"articles": n, "fields": fields}
    atomicfile.write_text(folder / FIELDS_FILE, json.dumps(data, ensure_ascii=False))
    return kinds


@dataclass(frozen=True)
class MetaField:
    """One metadata field: its kind, its column (None for "mixed"), a string field's values."""

    name: str
    kind: str
    column: np.ndarray | None
    values: tuple[str, ...] = ()


class MetaColumns:
    """The metadata columns of one opened index folder (memory-mapped, read-only)."""

    def __init__(self, folder: Path, n_docs: int) -> None:
        from . import store  # store imports columns, which this module does not need

        path = folder / FIELDS_FILE
        if not path.exists():
            raise IndexFormatError(
                f"{folder}: this index was built before metadata filters; rebuild it "
                "('hunchwise index build') to filter on metadata"
            )
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
            entries = data["fields"]
            if data["articles"] != n_docs:
                raise ValueError(f"{data['articles']} articles, the manifest says {n_docs}")
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise IndexFormatError(f"{path} is unreadable ({exc}); rebuild the index") from exc
        self.n_docs = n_docs
        self.fields: dict[str, MetaField] = {}
        dtypes = {"string": "int32", "number": "float64", "bool": "int8"}
        for i, e in enumerate(entries):
            kind = e.get("kind")
            if kind not in KINDS:
                raise IndexFormatError(f"{path}: field {e.get('name')!r} has kind {kind!r}")
            column = (
                None
                if kind == "mixed"
                else store.open_array(folder, f"meta_{i}", dtypes[kind], n_docs)
            )
            name = str(e["name"])
            self.fields[name] = MetaField(name, kind, column, tuple(e.get("values", ())))

    @classmethod
    def of_fields(cls, n_docs: int, fields: dict[str, MetaField]) -> MetaColumns:
        """Columns held in memory rather than opened from a folder (see `concat`)."""
        out = cls.__new__(cls)
        out.n_docs, out.fields = n_docs, fields
        return out


_MISSING = {"string": -1, "number": np.nan, "bool": -1}
_DTYPES = {"string": np.int32, "number": np.float64, "bool": np.int8}


def concat(parts: list[MetaColumns]) -> MetaColumns:
    """The columns of several folders of consecutive rows (a sharded index's shards) as the
    one folder of all their articles would hold them: each shard typed its fields over its
    own articles, so a field's kind is decided again over all of them (kinds that differ
    make it "mixed", as `write_meta_columns` decides), string codes are mapped to the sorted
    union of the shards' values (a code means a value only within its own shard), and a
    shard lacking a field gets the "lacks it" value. Copies one array per filterable field
    into memory (4, 8 or 1 bytes an article)."""
    n_docs = sum(p.n_docs for p in parts)
    kinds: dict[str, str] = {}
    for part in parts:
        for name, f in part.fields.items():
            seen = kinds.setdefault(name, f.kind)
            if seen != f.kind:
                kinds[name] = "mixed"
    fields: dict[str, MetaField] = {}
    for name, kind in kinds.items():
        if kind == "mixed":
            fields[name] = MetaField(name, kind, None)
            continue
        held = [p.fields.get(name) for p in parts]
        values = sorted({v for h in held if h is not None for v in h.values})
        code = {v: c for c, v in enumerate(values)}
        pieces = []
        for part, got in zip(parts, held, strict=True):
            if got is None or got.column is None:
                pieces.append(np.full(part.n_docs, _MISSING[kind], dtype=_DTYPES[kind]))
            elif kind == "string":
                # -1 (lacks it) indexes the appended -1, every other code its global code.
                remap = np.array([code[v] for v in got.values] + [-1], dtype=np.int32)
                pieces.append(remap[np.asarray(got.column)])
            else:
                pieces.append(np.asarray(got.column, dtype=_DTYPES[kind]))
        column = np.concatenate(pieces) if pieces else np.empty(0, dtype=_DTYPES[kind])
        fields[name] = MetaField(name, kind, column, tuple(values))
    return MetaColumns.of_fields(n_docs, fields)
