"""Per-row tables the compiled features read, filled the first time a row is a candidate.

Two tables, each one row per article and never looped over whole:
- the row values: what the features need of a row that does not depend on the clue
  (ROW_VALUES);
- the name table: each row's base-name, qualifier and alias tokens as small integer ids
  (one numbering per index, handed out as rows are seen), so that testing them against a
  clue is integer work.

The column orders ROW_VALUES and SPANS are the ones _fused.c was built with (fused.py
checks it at import).

The tables start as zeros, which the operating system hands out page by page as rows are
touched, so a large index costs nothing up front.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence

import numpy as np

from retriever import Index

from .names import analyze_names, index_cache

# Columns of the row-values table; the last is 1 once the row is filled.
ROW_VALUES = (
    "inlinks", "log_inlinks", "log_popularity", "popularity_missing", "log_doc_length",
    "has_qualifier", "qualifier_frequency", "(filled)",
)  # fmt: skip
# Columns of NameTable.spans: 1 once filled, where the row's ids start in the arena, and how
# many base-name, qualifier and alias ids follow there, in that order.
SPANS = ("ready", "start", "base", "qualifier", "alias")


def values_table(index: Index) -> np.ndarray:
    """The whole row-values table of `index` (rows not seen yet are zeros)."""
    cache = index_cache(index)
    table: np.ndarray | None = cache.get("row_values")
    if table is None:  # setdefault: two threads starting at once get the same table
        table = cache.setdefault("row_values", np.zeros((len(index), len(ROW_VALUES))))
    return table


def _store_values(
    index: Index, rows: np.ndarray, qualified: Sequence[bool], qualifier_count: Sequence[int]
) -> None:
    inl = np.asarray(index.inlinks[rows], dtype=np.float64)
    pop = np.asarray(index.popularity[rows], dtype=np.float64)
    missing = np.isnan(pop)
    columns: dict[str, np.ndarray | Sequence[bool] | float] = {
        "inlinks": inl,
        "log_inlinks": np.log1p(inl),
        "log_popularity": np.log1p(np.where(missing, 0.0, pop)),
        "popularity_missing": missing,
        "log_doc_length": np.log1p(np.asarray(index.doc_len[rows], dtype=np.float64)),
        "has_qualifier": qualified,
        "qualifier_frequency": np.log1p(np.asarray(qualifier_count, dtype=np.float64)),
        "(filled)": 1.0,
    }
    fill = np.empty((rows.size, len(ROW_VALUES)))
    for j, name in enumerate(ROW_VALUES):
        fill[:, j] = columns[name]
    values_table(index)[rows] = fill


class NameTable:
    """Name tokens of the rows seen so far, as ids into one growing int32 arena.

    `lock` guards the whole table: hold it while filling rows and while a reader uses the
    arrays, since filling may replace the arena with a larger copy.
    """

    def __init__(self, n_rows: int) -> None:
        self.lock = threading.Lock()
        self.ids: dict[str, int] = {}  # name token -> id
        self.spans = np.zeros((n_rows, len(SPANS)), dtype=np.int64)
        self.arena = np.zeros(1024, dtype=np.int32)
        self.used = 0

    def clue_ids(self, tokens: Sequence[str]) -> list[int]:
        """Ids of the clue tokens that are some seen row's name token (others match none)."""
        get = self.ids.get
        return [i for i in map(get, tokens) if i is not None]

    def fill(self, index: Index, rows: np.ndarray) -> None:
        """Add the rows among `rows` not in the table yet, and their row values (call with
        `lock` held).

        The names are analyzed as for `features.row_names`, but not kept as strings:
        a large index would hold millions of small tuples, which cost memory and slow every
        run of the garbage collector.
        """
        new = np.unique(rows[self.spans[rows, 0] == 0])
        if not new.size:
            return
        ids = self.ids
        parts: list[int] = []
        spans = np.empty((new.size, len(SPANS)), dtype=np.int64)
        qualified, qualifier_count = [], []
        for j, (_, count, *tokens) in enumerate(analyze_names(index, new)):
            start = self.used + len(parts)
            for toks in tokens:  # base name, qualifier, aliases
                parts.extend(ids.setdefault(t, len(ids)) for t in toks)
            spans[j] = (1, start, *map(len, tokens))
            qualified.append(bool(tokens[1]))
            qualifier_count.append(count)
        end = self.used + len(parts)
        if end > self.arena.size:  # grow by doubling; readers hold the lock, so none sees it
            grown = np.zeros(max(end, 2 * self.arena.size), dtype=np.int32)
            grown[: self.used] = self.arena[: self.used]
            self.arena = grown
        self.arena[self.used : end] = parts
        self.used = end
        self.spans[new] = spans
        _store_values(index, new, qualified, qualifier_count)


def name_table(index: Index) -> NameTable:
    """The NameTable of `index` (created empty on first use)."""
    cache = index_cache(index)
    table: NameTable | None = cache.get("name_table")
    if table is None:
        table = cache.setdefault("name_table", NameTable(len(index)))
    return table
