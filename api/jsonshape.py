"""The shape of a parsed JSON value (depth, size, non-finite numbers), found without recursion.

Request bodies can nest arrays and objects thousands of levels deep. Anything that walks
them recursively (Python functions, jsonable_encoder, json.dumps) ends in RecursionError,
which would surface as a 500. This walk keeps its own stack, so any depth the JSON parser
accepted is measured safely; callers then refuse or summarise values that are too deep.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any

# How NaN and the infinities are spelled when an error message must show them (JSON has none).
_SPELLED = {"NaN": "nan", "Infinity": "inf", "-Infinity": "-inf"}


@dataclass(frozen=True)
class JsonShape:
    """What a walk over a parsed JSON value found."""

    depth: int
    """Levels of arrays/objects: 0 for a scalar, 1 for a flat array or object."""
    size: int
    """Roughly its length as JSON: one per value, plus the characters of strings and keys."""
    non_finite: bool
    """Whether it holds NaN or an infinity (Python's JSON parser lets them in)."""


def json_shape(value: Any) -> JsonShape:
    """Depth, size and non-finite numbers of a parsed JSON value (dicts, lists, scalars)."""
    depth = size = 0
    non_finite = False
    stack: list[tuple[Any, int]] = [(value, 0)]
    while stack:
        item, level = stack.pop()
        size += 1
        if isinstance(item, dict):
            depth = max(depth, level + 1)
            size += sum(len(str(k)) for k in item)
            stack.extend((v, level + 1) for v in item.values())
        elif isinstance(item, list | tuple):
            depth = max(depth, level + 1)
            stack.extend((v, level + 1) for v in item)
        elif isinstance(item, str):
            size += len(item)
        elif isinstance(item, float) and not math.isfinite(item):
            non_finite = True
    return JsonShape(depth=depth, size=size, non_finite=non_finite)


def spell_non_finite(value: Any) -> Any:
    """A copy of a small JSON value with NaN/inf as the strings 'nan', 'inf', '-inf'.

    Only for values whose depth json_shape has bounded: the C encoder and decoder recurse.
    """
    return json.loads(json.dumps(value, allow_nan=True), parse_constant=_SPELLED.__getitem__)
