"""Argument types and options that several commands share."""

from __future__ import annotations

import argparse
import json
import re
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


def positive_int(text: str) -> int:
    """An argparse type: a whole number of at least 1."""
    try:
        value = int(text)
    except ValueError:
        value = 0  # fails the check below, with the same message
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return value


_SIZE = re.compile(r"\s*(\d+(?:\.\d+)?)\s*([kmgt]?)(?:i?b)?\s*", re.IGNORECASE)


def byte_size(text: str) -> int:
    """An argparse type: a size in bytes, with an optional binary unit (512M, 2G, 1.5GiB)."""
    m = _SIZE.fullmatch(text)
    if m is None:
        raise argparse.ArgumentTypeError(f"expected a size like 512M or 2G, got {text!r}")
    unit = m.group(2).lower()
    value = int(float(m.group(1)) * 1024 ** ("kmgt".index(unit) + 1 if unit else 0))
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a size of at least 1 byte, got {text!r}")
    return value


def prefix_shares(text: str) -> tuple[float, ...]:
    """An argparse type: comma-separated shares of a clue's words, each in (0, 1]."""
    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected comma-separated numbers like 0.2,0.5,1, got {text!r}"
        ) from None
    if not values or any(not 0 < v <= 1 for v in values):
        raise argparse.ArgumentTypeError("prefix fractions must be between 0 (exclusive) and 1")
    return values


def add_prefix_options(p: argparse.ArgumentParser, help: str) -> None:
    """--prefixes F,F,... (the shares of each clue's words that become rows, `help`) or
    --every-words N."""
    p.add_argument("--prefixes", type=prefix_shares, default=None, metavar="F,F,...", help=help)
    p.add_argument(
        "--every-words",
        type=int,
        default=None,
        metavar="N",
        help="instead of --prefixes, take a prefix every N words",
    )


def add_share_option(p: argparse.ArgumentParser, flag: str, help: str) -> None:
    """`flag` SHARE: a number from 0 to 1, None when not given."""
    p.add_argument(flag, type=unit_share, default=None, metavar="SHARE", help=help)


DEFAULT_PORT = 8000


def add_port_option(p: argparse.ArgumentParser, what: str = "") -> None:
    """--port: the service's port (`what` after the word in the help), 0 for any free one."""
    p.add_argument(
        "--port",
        type=int,
        default=DEFAULT_PORT,
        help=f"port{what} (default {DEFAULT_PORT}; 0: any free port)",
    )


def add_ablation_option(p: argparse.ArgumentParser) -> None:
    """--no-ablation: skip refitting the model without each feature group."""
    p.add_argument("--no-ablation", action="store_true", help="skip the feature ablation (faster)")


def add_model_option(p: argparse.ArgumentParser) -> None:
    """--model FILE, required: the model a command ranks or scores with."""
    p.add_argument(
        "--model", type=Path, required=True, help="model file written by 'hunchwise train'"
    )


def add_reporting_options(p: argparse.ArgumentParser, what: str, bad: str = "log lines") -> None:
    """--skip-bad (bad input lines counted and skipped) and --json (`what` printed as JSON)."""
    p.add_argument(
        "--skip-bad", action="store_true", help=f"skip bad {bad} (counted) instead of stopping"
    )
    p.add_argument("--json", action="store_true", help=f"print {what} as JSON")


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


def add_ray_option(p: argparse.ArgumentParser, what: str) -> None:
    """--ray ADDRESS|local: do `what` on a Ray cluster (the output is the same as without)."""
    p.add_argument(
        "--ray",
        default=None,
        metavar="ADDRESS",
        help=f"{what} on this Ray cluster, or 'local' to start one here (needs the 'cluster' "
        "extra; the output is the same as without; default: in this process)",
    )
