"""A clue's candidates as the features see them, and the log metadata that become columns."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from operator import attrgetter
from typing import Any, Protocol

import numpy as np

from retriever import Index

from .registry import CandidateSet, DenseInfo


class _WithMetadata(Protocol):
    """Anything carrying a clue's metadata (a labelled clue, a served request)."""

    @property
    def metadata(self) -> dict[str, Any]:
        """The clue's metadata fields."""
        ...


@dataclass(frozen=True)
class MetadataColumns:
    """Log metadata used as features: numeric ones as they are, categorical ones one-hot."""

    numeric: tuple[str, ...] = ()
    categorical: dict[str, tuple[str, ...]] = field(default_factory=dict)

    @property
    def names(self) -> list[str]:
        """Column names as they appear in the model."""
        out = [f"meta:{n}" for n in self.numeric]
        for name, values in self.categorical.items():
            out.extend(f"meta:{name}={v}" for v in values)
        return out

    @classmethod
    def learn(cls, clues: Sequence[_WithMetadata], names: Sequence[str]) -> MetadataColumns:
        """Decide numeric or categorical per name from the training logs; learn category values."""
        numeric, categorical = [], {}
        for name in names:
            values = [c.metadata.get(name) for c in clues if c.metadata.get(name) is not None]
            if not values:
                raise ValueError(f"metadata field {name!r} never appears in the logs")
            if all(isinstance(v, int | float) and not isinstance(v, bool) for v in values):
                numeric.append(name)
            else:
                categorical[name] = tuple(sorted({str(v) for v in values}))
        return cls(tuple(numeric), categorical)

    def row(self, metadata: dict[str, Any]) -> np.ndarray:
        """Values for one clue; unseen categories and missing fields give zeros."""
        vals: list[float] = []
        for n in self.numeric:
            v = metadata.get(n)
            vals.append(float(v) if isinstance(v, int | float) and not isinstance(v, bool) else 0.0)
        for name, cats in self.categorical.items():
            v = metadata.get(name)
            vals.extend(1.0 if v is not None and str(v) == c else 0.0 for c in cats)
        return np.asarray(vals, dtype=np.float64)


def candidate_set(
    index: Index,
    clue: str,
    hits: Sequence[Any],
    metadata: dict[str, Any] | None = None,
    tokens: list[str] | None = None,
    words: list[str] | None = None,
    dense: DenseInfo | None = None,
) -> CandidateSet:
    """The CandidateSet of a clue from its BM25 hits.

    `tokens` and `words`: the clue already analyzed (`index.analyzer.tokens` and `.words`),
    as the serving path does once per clue.
    """
    n = len(hits)
    return CandidateSet(
        index=index,
        clue=clue,
        words=index.analyzer.words(clue) if words is None else words,
        tokens=index.analyzer.tokens(clue) if tokens is None else tokens,
        rows=np.fromiter(map(_ROW, hits), np.int64, n),
        scores=np.fromiter(map(_SCORE, hits), np.float64, n),
        ranks=np.fromiter(map(_RANK, hits), np.int64, n),
        metadata=metadata or {},
        dense=dense,
    )


_ROW, _SCORE, _RANK = attrgetter("row"), attrgetter("score"), attrgetter("rank")
