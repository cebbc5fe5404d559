"""Metadata filters: a JSON object of conditions compiled to a boolean mask over the rows.

The syntax (every condition must hold; an article lacking a field matches no condition on it):
    {"kind": "town"}                          equality (a string, number or true/false)
    {"kind": {"in": ["town", "river"]}}       membership in a list of values
    {"year": {"gte": 1800, "lt": 1900}}       ranges on numbers: gt, gte, lt, lte
    {"kind": {"eq": "town"}}                  equality again, in operator form
Operators of one field are combined with "and". The mask is computed with numpy over the
stored columns (retriever/metacolumns.py) on every call: nothing is cached beyond the open
index, so a reloaded index is filtered on its own columns.
"""

from __future__ import annotations

import bisect
import math
import reprlib
from collections.abc import Mapping
from typing import Any

import numpy as np

from .errors import FilterError
from .metacolumns import MetaColumns, MetaField

RANGE_OPS = ("gt", "gte", "lt", "lte")
OPERATORS = ("eq", "in", *RANGE_OPS)
MAX_IN = 10_000  # values one "in" list may hold (a cap on work, common practice, no source)


def _shown(value: Any) -> str:
    """A value for an error message, cut short (a request may send anything)."""
    return reprlib.repr(value)


def _type_name(kind: str) -> str:
    return {"string": "a string", "number": "a number", "bool": "true or false"}[kind]


def _finite_number(value: Any) -> bool:
    if not isinstance(value, int | float) or isinstance(value, bool):
        return False
    try:
        return math.isfinite(float(value))
    except OverflowError:  # an integer beyond float range
        return False


def _check_value(f: MetaField, value: Any, op: str) -> Any:
    """The value, if it has the field's type; else a FilterError naming the field."""
    kind = f.kind
    ok = (
        (kind == "string" and isinstance(value, str))
        or (kind == "bool" and isinstance(value, bool))
        or (kind == "number" and _finite_number(value))
    )
    if not ok:
        raise FilterError(
            f"'{op}' needs {_type_name(kind)} (the field holds {kind} values), got {_shown(value)}",
            field=f.name,
        )
    return value


def _equal(f: MetaField, column: np.ndarray, values: list[Any]) -> np.ndarray:
    """Rows whose value is one of `values` (already type-checked)."""
    if f.kind == "string":
        codes = []
        for v in values:
            at = bisect.bisect_left(f.values, v)
            if at < len(f.values) and f.values[at] == v:
                codes.append(at)
        targets = np.asarray(codes, dtype=np.int32)
    elif f.kind == "bool":
        targets = np.asarray([int(v) for v in values], dtype=np.int8)
    else:
        targets = np.asarray(values, dtype=np.float64)
    if targets.size == 1:
        return np.asarray(column == targets[0])
    return np.isin(column, targets)


def _condition(f: MetaField, cond: Any) -> np.ndarray:
    column = f.column
    if column is None:
        raise FilterError(
            "holds values of several types (or lists/objects) across the articles, so it "
            "cannot be filtered on",
            field=f.name,
        )
    if not isinstance(cond, dict):
        if isinstance(cond, list):
            raise FilterError(
                'give a list of values as {"in": [...]}, a single value as is', field=f.name
            )
        return _equal(f, column, [_check_value(f, cond, "eq")])
    if not cond:
        raise FilterError(f"an empty condition; use one of {', '.join(OPERATORS)}", field=f.name)
    mask = np.ones(column.shape[0], dtype=bool)
    for op, arg in cond.items():
        if op not in OPERATORS:
            raise FilterError(
                f"unknown operator {_shown(op)}; use one of {', '.join(OPERATORS)}", field=f.name
            )
        if op == "eq":
            mask &= _equal(f, column, [_check_value(f, arg, op)])
        elif op == "in":
            if not isinstance(arg, list):
                raise FilterError(f"'in' needs a list of values, got {_shown(arg)}", field=f.name)
            if len(arg) > MAX_IN:
                raise FilterError(f"'in' lists at most {MAX_IN} values", field=f.name)
            mask &= _equal(f, column, [_check_value(f, v, op) for v in arg])
        else:
            if f.kind != "number":
                raise FilterError(
                    f"'{op}' compares numbers, but the field holds {f.kind} values", field=f.name
                )
            bound = float(_check_value(f, arg, op))
            with np.errstate(invalid="ignore"):  # NaN (lacks the field) compares false
                if op == "gt":
                    mask &= column > bound
                elif op == "gte":
                    mask &= column >= bound
                elif op == "lt":
                    mask &= column < bound
                else:
                    mask &= column <= bound
    return mask


def compile_filter(spec: Mapping[str, Any], meta: MetaColumns) -> np.ndarray:
    """The boolean mask (one entry per row) of the articles `spec` keeps.

    Raises FilterError naming the field for an unknown field, a wrong type or a bad operator.
    """
    if not isinstance(spec, Mapping):
        raise FilterError(f"a filter is a JSON object of field conditions, got {_shown(spec)}")
    mask = np.ones(meta.n_docs, dtype=bool)
    for name, cond in spec.items():
        f = meta.fields.get(name)
        if f is None:
            known = ", ".join(sorted(meta.fields)[:20]) or "none"
            raise FilterError(
                f"no article has this metadata field (fields: {known})", field=str(name)
            )
        mask &= _condition(f, cond)
    return mask
