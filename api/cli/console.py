"""Small helpers for command-line output: tables for people, JSON for scripts, errors."""

from __future__ import annotations

import json
import sys
from collections.abc import Sequence
from typing import Any


def print_json(data: Any) -> None:
    """Print `data` as indented JSON on stdout."""
    print(json.dumps(data, indent=2, ensure_ascii=False, default=str))


def format_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A plain aligned text table; numbers are right-aligned."""
    cells = [[_fmt(v) for v in row] for row in rows]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]
    numeric = [
        all(isinstance(row[i], int | float) for row in rows) if rows else False
        for i in range(len(headers))
    ]

    def line(values: Sequence[str]) -> str:
        return "  ".join(
            v.rjust(w) if num else v.ljust(w)
            for v, w, num in zip(values, widths, numeric, strict=True)
        )

    out = [line(list(headers)), "  ".join("-" * w for w in widths)]
    out.extend(line(r) for r in cells)
    return "\n".join(s.rstrip() for s in out)


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.4f}"
    return str(value)


def human_bytes(n: int) -> str:
    """1536 -> '1.5 KiB'."""
    size = float(n)
    for unit in ("B", "KiB", "MiB", "GiB"):
        if size < 1024 or unit == "GiB":
            return f"{size:.1f} {unit}" if unit != "B" else f"{int(size)} B"
        size /= 1024
    return f"{size:.1f} GiB"


def show_progress(as_json: bool = False) -> bool:
    """Progress bars only for a person watching: not with --json, not into a pipe or file.

    Bars are redrawn with carriage returns; in a log file or a pipe they pile up as noise.
    """
    return not as_json and sys.stderr.isatty()


def check_k(k: int | None) -> None:
    """Refuse a -k below 1 (None means the command's default)."""
    if k is not None and k < 1:
        raise ValueError(f"-k must be at least 1, got {k}")


def warn(message: str) -> None:
    """Print a one-line warning to stderr (results stay on stdout, so pipes get clean data)."""
    print(f"hunchwise: warning: {message}", file=sys.stderr)


def fail(message: str, code: int = 2) -> int:
    """Print a one-line error to stderr and return the exit code."""
    print(f"hunchwise: error: {message}", file=sys.stderr)
    return code
