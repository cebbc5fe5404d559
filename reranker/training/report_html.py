"""HTML building blocks of the evaluation report: escaped tables, sections, embedded images."""

from __future__ import annotations

import base64
import html
import json
import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .report_captions import CAPTIONS

CSS = """body{font-family:sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}
h2{border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:1.6em}
.scroll{max-width:100%;overflow-x:auto}
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ccc;padding:3px 8px}
th{background:#f0f0f0;text-align:left}td{overflow-wrap:break-word}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
figure{margin:1em 0}img{max-width:100%;height:auto}
figcaption{color:#444;font-size:.92em;max-width:75ch;margin-top:.3em}
.note{background:#fff6d5;border-left:4px solid #e0b000;padding:.5em 1em}
.warning{background:#fde8e8;border-left:4px solid #c0392b;padding:.5em 1em}
.fine{background:#e8f6ea;border-left:4px solid #2e8b57;padding:.5em 1em}"""


def to_jsonable(obj: Any) -> Any:
    """Plain-JSON form: numpy values to Python, tuples to lists, NaN/inf to None, keys to str."""
    if isinstance(obj, Mapping):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple | np.ndarray):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


_NUMBER = re.compile(r"-?\d[\d.]*%?$")  # a cell already written as a number or percentage
SIGNIFICANT = 3  # digits of a measured number shown to people; metrics.json keeps them all


def sig(value: float, digits: int = SIGNIFICANT) -> str:
    """`value` to `digits` significant digits: plain notation (0.0123, 0.950, 12300) between
    0.001 and a million, exponent notation outside (6.16e-16) rather than a run of zeros.

    Written by hand because Python's "g" format switches to exponent notation from 1e-5 and
    1e3 on, and drops the trailing zeros that keep a column of numbers aligned.
    """
    if not math.isfinite(value):
        return "n/a"
    if value == 0:
        return "0"
    rounded = float(f"{value:.{digits - 1}e}")
    exponent = math.floor(math.log10(abs(rounded)))
    if not -3 <= exponent < 6:
        return f"{rounded:.{digits - 1}e}"
    return f"{rounded:.{max(0, digits - 1 - exponent)}f}"


def percent(share: float) -> str:
    """A share as a percentage with three significant digits (0.0532 -> 5.32%, 1.0 -> 100%)."""
    return sig(100 * share) + "%"


def _rounded(obj: Any) -> Any:
    """`obj` with every float cut to three significant digits, for showing nested values."""
    if isinstance(obj, Mapping):
        return {str(k): _rounded(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple | np.ndarray):
        return [_rounded(v) for v in obj]
    if isinstance(obj, float | np.floating) and math.isfinite(obj):
        return float(sig(float(obj)))
    return to_jsonable(obj)


def fmt(value: Any) -> str:
    """Short display form of one value for people: floats to three significant digits,
    integers (counts) whole, None as n/a; lists and dicts as JSON with rounded floats."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, bool | str):
        return str(value)
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        return sig(float(value))
    if isinstance(value, list | tuple) and all(isinstance(v, str) for v in value):
        return ", ".join(value)
    return json.dumps(_rounded(value), ensure_ascii=False)


def table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """An HTML table with every cell escaped; numbers right-aligned."""
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for v in row:
            number = isinstance(v, int | float | np.number) and not isinstance(v, bool)
            cls = ' class="num"' if v is None or number or _NUMBER.match(str(v)) else ""
            cells.append(f"<td{cls}>{html.escape(fmt(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    # A wide table scrolls inside its own box instead of widening the page.
    return f'<div class="scroll"><table><tr>{head}</tr>{"".join(body)}</table></div>'


def flatten(data: Mapping[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    """Nested dicts as (dotted key, value) pairs so a generic table loses nothing."""
    out: list[tuple[str, Any]] = []
    for key, value in data.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            out.extend(flatten(value, name + "."))
        else:
            out.append((name, value))
    return out


def kv_table(data: Mapping[str, Any]) -> str:
    """A generic key/value table of a (possibly nested) dict."""
    return table(("key", "value"), flatten(data))


def figure(png: Path, alt: str, caption: str) -> str:
    """A <figure>: the PNG embedded as a base64 data URI, and a caption saying how to read it."""
    data = base64.b64encode(png.read_bytes()).decode("ascii")
    return (
        f'<figure><img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'
        f"<figcaption>{html.escape(caption)}</figcaption></figure>"
    )


def image(paths: Mapping[str, Path], name: str, alt: str) -> str:
    """The chart `name` as a figure captioned from `CAPTIONS`, or a note when there is none."""
    if name not in paths:
        return "<p>No data for this chart.</p>"
    return figure(paths[name], alt, CAPTIONS[name])


def section(sid: str, heading: str, body: str) -> str:
    """One report section with an id anchor."""
    return f'<section id="{sid}"><h2>{html.escape(heading)}</h2>{body}</section>'


def paragraph(text: str, cls: str | None = None) -> str:
    """An escaped paragraph, optionally with a CSS class (note, warning, fine)."""
    attr = f' class="{cls}"' if cls else ""
    return f"<p{attr}>{html.escape(text)}</p>"


def rows_html(
    rows: Sequence[Mapping[str, Any]], known: Sequence[str], labels: Mapping[str, str] | None = None
) -> str:
    """A table of dict rows: known columns first, then any other keys found; a column's header
    is its label where `labels` has one, else its key."""
    cols = list(known)
    for r in rows:
        cols += [k for k in r if k not in cols]
    header = [(labels or {}).get(c, c) for c in cols]
    return table(header, [[r.get(c) for c in cols] for r in rows]) if rows else "<p>No rows.</p>"
