"""Argument types and options that several commands share."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any


def bounded_number(low: float, high: float, describe: str) -> Callable[[str], float]:
    """An argparse type: a number from `low` to `high` (both included), else `describe` says
    what was expected."""

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = float("nan")  # fails the range check below, with the same message
        if not low <= value <= high:
            raise argparse.ArgumentTypeError(f"expected {describe}, got {text!r}")
        return value

    return parse


unit_share = bounded_number(0.0, 1.0, "a number between 0 and 1")
# Finite: the upper bound is the largest float, so "inf" is refused.
at_least_zero = bounded_number(0.0, 1.7976931348623157e308, "a number of at least 0")


def add_log_option(p: argparse.ArgumentParser) -> None:
    """--log FILE, repeatable and required: the labelled or served logs a command reads."""
    p.add_argument(
        "--log",
        type=Path,
        action="append",
        required=True,
        metavar="FILE",
        help="labelled log (clue + answer lines) or served log with feedback; repeat for several",
    )


def add_index_option(p: argparse.ArgumentParser) -> None:
    """--index DIR, required: the index folder a command reads."""
    p.add_argument(
        "--index", type=Path, required=True, help="index folder built by 'hunchwise index build'"
    )


def add_feature_option(p: argparse.ArgumentParser, help: str) -> None:
    """--feature MODULE:FUNCTION, repeatable: user-defined feature functions."""
    p.add_argument("--feature", action="append", default=[], metavar="MODULE:FUNCTION", help=help)


def metadata_filter(text: str) -> dict[str, Any]:
    """An argparse type: a metadata filter, the JSON object POST /v1/rank takes as "filter"."""
    try:
        value = json.loads(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"not valid JSON ({exc}): {text!r}") from exc
    if not isinstance(value, dict):
        raise argparse.ArgumentTypeError(
            f'expected a JSON object of field conditions, e.g. \'{{"kind": "town"}}\', got {text!r}'
        )
    return value


def add_filter_option(p: argparse.ArgumentParser) -> None:
    """--filter JSON: keep only candidates whose article metadata match (README: filters)."""
    p.add_argument(
        "--filter",
        type=metadata_filter,
        default=None,
        metavar="JSON",
        help='only articles whose metadata match, e.g. \'{"kind": {"in": ["town", "river"]}}\' '
        '(the syntax of the service\'s "filter"; chosen before the top-k cut)',
    )
