"""Candidate features: the registry, the built-in features, and user-defined ones.

A feature is a function of a CandidateSet (one clue and its top-k candidates) that returns
one float per candidate. Each works on whole arrays of candidates at once.
"""

from __future__ import annotations

import importlib
import weakref
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from importlib.metadata import entry_points
from typing import Any

import numpy as np

from retriever import Index

from .errors import FeatureError

FEATURE_SET_VERSION = 1
ENTRY_POINT_GROUP = "hunchwise.features"


@dataclass
class CandidateSet:
    """One clue (or clue prefix) and its BM25 candidates, the input of every feature."""

    index: Index
    clue: str
    words: list[str]
    tokens: list[str]
    rows: np.ndarray  # int64, shape (n,): index rows of the candidates, best BM25 first
    scores: np.ndarray  # float64, shape (n,)
    ranks: np.ndarray  # int64, shape (n,), 1-based
    metadata: dict[str, Any] = field(default_factory=dict)
    memo: dict[str, Any] = field(default_factory=dict)  # values several features share

    def __len__(self) -> int:
        return int(self.rows.size)

    @cached_property
    def token_set(self) -> frozenset[str]:
        """Distinct analyzed tokens of the clue."""
        return frozenset(self.tokens)

    def _cached(self, kind: str) -> list[frozenset[str]]:
        table = name_tokens(self.index, kind)
        return [table[r] for r in self.rows.tolist()]

    @cached_property
    def base_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of each candidate's title without its qualifier."""
        return self._cached("base")

    @cached_property
    def qualifier_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of each candidate's qualifier (empty when unqualified)."""
        return self._cached("qualifier")

    @cached_property
    def alias_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of all of each candidate's aliases, one frozenset per candidate."""
        return self._cached("aliases")


_CACHES: weakref.WeakKeyDictionary[Index, dict[Any, Any]] = weakref.WeakKeyDictionary()


def index_cache(index: Index) -> dict[Any, Any]:
    """A dict of derived values that lives as long as `index` (title tokens and the like)."""
    cache = _CACHES.get(index)
    if cache is None:
        cache = _CACHES[index] = {}
    return cache


def name_tokens(index: Index, kind: str) -> list[frozenset[str]]:
    """Analyzed tokens of every row's base title, qualifier or aliases, computed once per index."""
    cache = index_cache(index)
    table: list[frozenset[str]] | None = cache.get(kind)
    if table is None:
        tokens_many = index.analyzer.tokens_many
        if kind == "base":
            table = [frozenset(t) for t in tokens_many(index.bases)]
        elif kind == "qualifier":
            table = [frozenset(t) for t in tokens_many(index.qualifiers)]
        elif kind == "aliases":
            table = [frozenset(t) for t in tokens_many(" ".join(a) for a in index.aliases)]
        else:
            raise ValueError(f"unknown name kind {kind!r}")
        cache[kind] = table
    return table


FeatureFunc = Callable[[CandidateSet], Any]


@dataclass(frozen=True)
class Feature:
    """A named feature: its group (for ablation), a one-line description, and its function."""

    name: str
    group: str
    description: str
    func: FeatureFunc
    trusted: bool = False  # built-ins skip the per-call checks; the matrix is checked once

    def compute(self, cs: CandidateSet) -> np.ndarray:
        """Run the function and check it returned one finite float per candidate."""
        try:
            values = np.asarray(self.func(cs), dtype=np.float64)
        except Exception as exc:  # a user feature may raise anything; report which one failed
            raise FeatureError(f"feature {self.name!r} failed: {exc!r}") from exc
        if values.shape != (len(cs),):
            raise FeatureError(
                f"feature {self.name!r} returned shape {values.shape}, expected ({len(cs)},)"
            )
        if not np.all(np.isfinite(values)):
            raise FeatureError(f"feature {self.name!r} returned NaN or infinite values")
        return values


class FeatureRegistry:
    """The features the running code can compute, by name, in a stable order."""

    def __init__(self, features: Iterable[Feature] = ()) -> None:
        self._features: dict[str, Feature] = {}
        self._resolved: dict[tuple[str, ...], list[Feature]] = {}
        for f in features:
            self.add(f)

    def add(self, feature: Feature) -> None:
        """Register a feature; names must be unique."""
        if feature.name in self._features:
            raise FeatureError(f"a feature named {feature.name!r} is already registered")
        self._resolved.clear()
        self._features[feature.name] = feature

    def __contains__(self, name: object) -> bool:
        return name in self._features

    def __getitem__(self, name: str) -> Feature:
        try:
            return self._features[name]
        except KeyError:
            raise FeatureError(
                f"unknown feature {name!r}; known: {', '.join(self._features)}"
            ) from None

    @property
    def names(self) -> list[str]:
        """All feature names in registration order."""
        return list(self._features)

    def groups(self) -> dict[str, list[str]]:
        """Feature names by group, groups in registration order."""
        out: dict[str, list[str]] = {}
        for f in self._features.values():
            out.setdefault(f.group, []).append(f.name)
        return out

    def resolve(self, names: Sequence[str]) -> list[Feature]:
        """The Feature objects of `names`, in order (remembered per list of names)."""
        key = tuple(names)
        found = self._resolved.get(key)
        if found is None:
            found = self._resolved[key] = [self[n] for n in key]
        return found

    def matrix(self, cs: CandidateSet, names: Sequence[str]) -> np.ndarray:
        """Feature values of the candidates. float64, shape (n_candidates, len(names))."""
        n = len(cs)
        if n == 0:
            return np.empty((0, len(names)))
        # Built-ins are called directly (their shapes are fixed by tests); this loop is over
        # features, not candidates, and per-call checks would cost more than the work.
        cols = [f.func(cs) if f.trusted else f.compute(cs) for f in self.resolve(names)]
        out = np.column_stack(cols)
        if not np.isfinite(out).all():
            bad = [names[int(j)] for j in np.flatnonzero(~np.isfinite(out).all(axis=0))]
            raise FeatureError(f"features {bad} returned NaN or infinite values")
        return out

    def with_user_features(
        self, specs: Sequence[str] = (), *, entry_point_group: str = ENTRY_POINT_GROUP
    ) -> FeatureRegistry:
        """A copy with features from installed entry points and `module:function` paths added."""
        reg = FeatureRegistry(self._features.values())
        for ep in entry_points(group=entry_point_group):
            reg.add(_as_feature(ep.name, ep.load()))
        for spec in specs:
            reg.add(_as_feature(None, load_function(spec)))
        return reg


def load_function(spec: str) -> FeatureFunc:
    """Import `package.module:function`."""
    module_name, sep, attr = spec.partition(":")
    if not sep or not module_name or not attr:
        raise FeatureError(f"feature path {spec!r} must look like 'package.module:function'")
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # ImportError, but also a module that fails while importing
        raise FeatureError(
            f"cannot import module {module_name!r} for feature {spec!r}: {exc}"
        ) from exc
    func = getattr(module, attr, None)
    if not callable(func):
        raise FeatureError(f"{spec!r}: module {module_name!r} has no function {attr!r}")
    return func


def _as_feature(name: str | None, obj: Any) -> Feature:
    if isinstance(obj, Feature):
        return obj
    if not callable(obj):
        raise FeatureError(f"user feature {name or obj!r} is not callable")
    fname = getattr(obj, "feature_name", None) or name or obj.__name__
    doc = (obj.__doc__ or "user-defined feature").strip().splitlines()[0]
    return Feature(
        f"user:{fname}" if not str(fname).startswith("user:") else fname, "user", doc, obj
    )
