"""Candidate features: the registry, the built-in features, and user-defined ones.

A feature is a function of a CandidateSet (one clue and its top-k candidates) that returns
one float per candidate. Each works on whole arrays of candidates at once.
"""

from __future__ import annotations

import importlib
import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from importlib.metadata import entry_points
from typing import Any

import numpy as np

from retriever import Index

from ..errors import FeatureError
from .names import RowNames, row_names

FEATURE_SET_VERSION = 1
ENTRY_POINT_GROUP = "hunchwise.features"


@dataclass(frozen=True)
class DenseInfo:
    """The word vectors' side of a hybrid candidate set; arrays aligned with its rows."""

    cosine: np.ndarray  # float64: cosine of the clue's and the article's vectors
    dense_rank: np.ndarray  # int64: rank in the vectors' pool, 0 when not in it
    fused_rank: np.ndarray  # int64: 1-based position in the fused list
    in_both: np.ndarray  # bool: in BM25's pool and in the vectors' pool


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
    dense: DenseInfo | None = None  # hybrid sets only: what the word vectors said

    def __len__(self) -> int:
        return int(self.rows.size)

    @cached_property
    def token_set(self) -> frozenset[str]:
        """Distinct analyzed tokens of the clue."""
        return frozenset(self.tokens)

    @cached_property
    def row_list(self) -> list[int]:
        """The candidates' index rows as Python ints."""
        rows: list[int] = self.rows.tolist()
        return rows

    @cached_property
    def names(self) -> list[RowNames]:
        """Qualifier and analyzed name tokens of each candidate (see `row_names`)."""
        return row_names(self.index, self.row_list)

    @cached_property
    def qualifiers(self) -> list[str]:
        """Each candidate's title qualifier ('' when unqualified)."""
        return [e.qualifier for e in self.names]

    @cached_property
    def base_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of each candidate's title without its qualifier."""
        return [frozenset(e.base) for e in self.names]

    @cached_property
    def qualifier_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of each candidate's qualifier (empty when unqualified)."""
        return [frozenset(e.qualifier_tokens) for e in self.names]

    @cached_property
    def alias_tokens(self) -> list[frozenset[str]]:
        """Analyzed tokens of all of each candidate's aliases, one frozenset per candidate."""
        return [frozenset(e.aliases) for e in self.names]


FeatureFunc = Callable[[CandidateSet], Any]
# Below this many of the fused features in one request, the features run one by one.
_MIN_FUSED = 6


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


@dataclass(frozen=True)
class FusedFeatures:
    """Features computed together by one function that shares intermediate arrays.

    `func` returns the columns of `features`, in that order, as one float64 (n, m) matrix
    equal to calling each feature's own function (tests/reranker/test_builtin.py checks it).
    """

    features: tuple[Feature, ...]
    func: Callable[[CandidateSet], np.ndarray]


@dataclass(frozen=True)
class _Plan:
    """How the registry computes one list of names: fused columns, then the others."""

    features: list[Feature]
    fused_pos: list[int]  # positions in the output filled from the fused matrix ...
    fused_cols: list[int]  # ... from these columns of it
    others: list[tuple[int, Feature]]
    all_fused: bool  # the output is the fused matrix itself


class FeatureRegistry:
    """The features the running code can compute, by name, in a stable order."""

    def __init__(
        self, features: Iterable[Feature] = (), *, fused: FusedFeatures | None = None
    ) -> None:
        self._features: dict[str, Feature] = {}
        self._plans: dict[tuple[str, ...], _Plan] = {}
        self._fused = fused
        for f in features:
            self.add(f)

    def add(self, feature: Feature) -> None:
        """Register a feature; names must be unique."""
        if feature.name in self._features:
            raise FeatureError(f"a feature named {feature.name!r} is already registered")
        self._plans.clear()
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

    def expand(self, names: Sequence[str]) -> list[str]:
        """Feature names from a list of feature names and group names (as the ablation uses).

        A group name stands for its features in registration order; repeats are dropped.
        """
        groups = self.groups()
        out: list[str] = []
        for name in names:
            if name in self._features:
                found = [name]
            elif name in groups:
                found = groups[name]
            else:
                raise FeatureError(
                    f"unknown feature or group {name!r}; groups: {', '.join(groups)}; "
                    f"features: {', '.join(self._features)}"
                )
            out.extend(n for n in found if n not in out)
        return out

    def resolve(self, names: Sequence[str]) -> list[Feature]:
        """The Feature objects of `names`, in order (remembered per list of names)."""
        return self._plan(names).features

    def _plan(self, names: Sequence[str]) -> _Plan:
        key = tuple(names)
        plan = self._plans.get(key)
        if plan is None:
            feats = [self[n] for n in key]
            col = {id(f): j for j, f in enumerate(self._fused.features)} if self._fused else {}
            fused = [(i, col[id(f)]) for i, f in enumerate(feats) if id(f) in col]
            if len(fused) < _MIN_FUSED:  # computing every fused column for a few costs more
                fused = []
            taken = {i for i, _ in fused}
            plan = self._plans[key] = _Plan(
                feats,
                [i for i, _ in fused],
                [j for _, j in fused],
                [(i, f) for i, f in enumerate(feats) if i not in taken],
                len(fused) == len(col) == len(feats) and all(i == j for i, j in fused),
            )
        return plan

    def matrix(self, cs: CandidateSet, names: Sequence[str]) -> np.ndarray:
        """Feature values of the candidates. float64, shape (n_candidates, len(names))."""
        n = len(cs)
        plan = self._plan(names)
        if n == 0:
            return np.empty((0, len(names)))
        if plan.all_fused and self._fused is not None:
            out = self._fused.func(cs)
        else:
            out = np.empty((n, len(names)))
            if plan.fused_pos and self._fused is not None:
                out[:, plan.fused_pos] = self._fused.func(cs)[:, plan.fused_cols]
            # Built-ins are called directly (their shapes are fixed by tests); this loop is
            # over features, not candidates, and per-call checks would cost more than the work.
            for j, f in plan.others:
                out[:, j] = f.func(cs) if f.trusted else f.compute(cs)
        # A finite sum means every value is finite (one reduction); otherwise look closer.
        if not math.isfinite(np.add.reduce(out, axis=None)) and not np.isfinite(out).all():
            bad = [names[int(j)] for j in np.flatnonzero(~np.isfinite(out).all(axis=0))]
            raise FeatureError(f"features {bad} returned NaN or infinite values")
        return out

    def with_user_features(
        self, specs: Sequence[str] = (), *, entry_point_group: str = ENTRY_POINT_GROUP
    ) -> FeatureRegistry:
        """A copy with features from installed entry points and `module:function` paths added."""
        reg = FeatureRegistry(self._features.values(), fused=self._fused)
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
