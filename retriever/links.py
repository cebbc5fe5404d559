"""Resolve names (ids, titles, aliases) to article rows and count in-links."""

from __future__ import annotations

from collections.abc import Sequence
from functools import cached_property

import numpy as np

from .corpus import normalize_title


class NameResolver:
    """Maps an id, exact title, normalized title or alias to a row, in that order of trust."""

    def __init__(
        self, ids: Sequence[str], titles: Sequence[str], aliases: Sequence[Sequence[str]]
    ) -> None:
        self._by_id = {doc_id: row for row, doc_id in enumerate(ids)}
        self._by_title = {title: row for row, title in enumerate(titles)}
        # An alias shared by several articles names none of them for sure; keep only unique ones.
        alias_rows: dict[str, set[int]] = {}
        for row, names in enumerate(aliases):
            for name in names:
                alias_rows.setdefault(normalize_title(name), set()).add(row)
        self._by_alias = {
            name: next(iter(rows)) for name, rows in alias_rows.items() if len(rows) == 1
        }
        self.ambiguous_aliases = sorted(name for name, rows in alias_rows.items() if len(rows) > 1)

    @cached_property
    def _by_norm(self) -> dict[str, int]:
        # Built on the first name that is neither an id nor an exact title.
        table: dict[str, int] = {}
        for title, row in self._by_title.items():
            table.setdefault(normalize_title(title), row)
        return table

    def row(self, name: str) -> int | None:
        """Row of the article `name` refers to, or None when nothing matches."""
        for table in (self._by_id, self._by_title):
            hit = table.get(name)
            if hit is not None:
                return hit
        norm = normalize_title(name)
        hit = self._by_norm.get(norm)
        if hit is not None:
            return hit
        return self._by_alias.get(norm)

    def how(self, name: str) -> str | None:
        """Which rule resolved `name`: 'id', 'title', 'normalized_title', 'alias', or None."""
        if name in self._by_id:
            return "id"
        if name in self._by_title:
            return "title"
        norm = normalize_title(name)
        if norm in self._by_norm:
            return "normalized_title"
        if norm in self._by_alias:
            return "alias"
        return None


def count_inlinks(
    resolver: NameResolver, links: Sequence[Sequence[str]], n_docs: int
) -> tuple[np.ndarray, list[tuple[int, str]]]:
    """In-link count of each article: distinct other articles linking to it.

    Returns (counts int32 of shape (n_docs,), the links that matched no article as
    (linking row, link text) pairs in row order).
    """
    hits: list[int] = []
    unresolved: list[tuple[int, str]] = []
    row_of = resolver.row
    for source, names in enumerate(links):
        if not names:
            continue
        targets: set[int] = set()
        for name in names:
            row = row_of(name)
            if row is None:
                unresolved.append((source, name))
            elif row != source:
                targets.add(row)
        hits.extend(targets)
    counts = np.bincount(np.asarray(hits, dtype=np.int64), minlength=n_docs).astype(np.int32)
    return counts, unresolved
