"""HTML building blocks of the evaluation report: escaped tables, sections, embedded images."""

from __future__ import annotations

import base64
import html
import json
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

CSS = """body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ccc;padding:3px 8px}
th{background:#f0f0f0}td.num{text-align:right;font-family:monospace}
.note{background:#fff6d5;border-left:4px solid #e0b000;padding:.5em 1em}img{max-width:100%}
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


def fmt(value: Any) -> str:
    """Short display form of one value (floats to 4 decimals, None as n/a)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, bool | str):
        return str(value)
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        return f"{float(value):.4f}"
    if isinstance(value, list | tuple) and all(isinstance(v, str) for v in value):
        return ", ".join(value)
    return json.dumps(to_jsonable(value), ensure_ascii=False)


def table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """An HTML table with every cell escaped; numbers right-aligned."""
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for v in row:
            cls = ' class="num"' if isinstance(v, int | float | np.number) or v is None else ""
            cells.append(f"<td{cls}>{html.escape(fmt(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


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


def image(paths: Mapping[str, Path], name: str, alt: str) -> str:
    """An <img> with the PNG embedded as a base64 data URI, or a note when there is none."""
    if name not in paths:
        return "<p>No data for this chart.</p>"
    data = base64.b64encode(paths[name].read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'


def section(sid: str, heading: str, body: str) -> str:
    """One report section with an id anchor."""
    return f'<section id="{sid}"><h2>{html.escape(heading)}</h2>{body}</section>'


def paragraph(text: str, cls: str | None = None) -> str:
    """An escaped paragraph, optionally with a CSS class (note, warning, fine)."""
    attr = f' class="{cls}"' if cls else ""
    return f"<p{attr}>{html.escape(text)}</p>"


def rows_html(rows: Sequence[Mapping[str, Any]], known: Sequence[str]) -> str:
    """A table of dict rows: known columns first, then any other keys found."""
    cols = list(known)
    for r in rows:
        cols += [k for k in r if k not in cols]
    return table(cols, [[r.get(c) for c in cols] for r in rows]) if rows else "<p>No rows.</p>"
