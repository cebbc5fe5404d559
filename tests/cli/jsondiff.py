"""Where two JSON documents from two runs of a command differ, for tests that compare runs."""

from __future__ import annotations

import math
from collections.abc import Collection
from typing import Any


def json_differences(
    x: Any,
    y: Any,
    *,
    ignore: Collection[str],
    same_name: tuple[str, str],
    tol: float = 0.0,
    path: str = "",
) -> list[str]:
    """Paths where `x` and `y` differ: numbers beyond `tol` (0: exactly), anything else at all;
    keys in `ignore` are skipped, and in strings `same_name[0]` reads as `same_name[1]` (the
    two runs' own folder or file names)."""

    def walk(u: Any, v: Any, at: str) -> list[str]:
        if isinstance(u, dict) and isinstance(v, dict):
            keys = (set(u) | set(v)) - set(ignore)
            return [d for k in sorted(keys) for d in walk(u.get(k), v.get(k), f"{at}/{k}")]
        if isinstance(u, list) and isinstance(v, list) and len(u) == len(v):
            pairs = enumerate(zip(u, v, strict=True))
            return [d for i, (a, b) in pairs for d in walk(a, b, f"{at}[{i}]")]
        numbers = (int, float)
        if tol and isinstance(u, numbers) and isinstance(v, numbers) and not isinstance(u, bool):
            close = math.isclose(u, v, rel_tol=tol, abs_tol=tol)
            return [] if close or (math.isnan(u) and math.isnan(v)) else [f"{at}: {u} != {v}"]
        if isinstance(u, str) and isinstance(v, str):
            u, v = u.replace(*same_name), v.replace(*same_name)
        return [] if u == v else [f"{at}: {str(u)[:60]} != {str(v)[:60]}"]

    return walk(x, y, path)
