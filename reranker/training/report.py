"""The evaluation report: metrics.json, PNG charts and one self-contained report.html."""

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

from retriever import atomicfile

from . import plots
from .report_speed import speed_section

CANDIDATE_KEYS = ("accuracy", "roc_auc", "log_loss", "brier", "ece", "n", "positive_rate")
CANDIDATE_MODELS = ("model", "bm25_only", "all_wrong")
CLUE_SUMMARY_KEYS = (
    "n_clues",
    "answer_in_candidates",
    "top_candidate_ece",
    "top_candidate_brier",
    "mean_top_probability",
)
CLUE_SHOWN = {
    *CLUE_SUMMARY_KEYS,
    "top1_bm25",
    "top1_reranked",
    "mrr_bm25",
    "mrr_reranked",
    "recall_at_k",
    "top_candidate_reliability",
}
PREFIX_KEYS = (
    "fraction",
    "n_clues",
    "top1_accuracy",
    "commit_rate",
    "accuracy_when_committed",
    "mean_payoff",
)
ABLATION_KEYS = ("name", "kind", "features", "log_loss", "brier", "roc_auc", "top1", "ece")
CSS = """body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ccc;padding:3px 8px}
th{background:#f0f0f0}td.num{text-align:right;font-family:monospace}
.note{background:#fff6d5;border-left:4px solid #e0b000;padding:.5em 1em}img{max-width:100%}"""


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


def _write_atomic(path: Path, text: str) -> None:
    """Write text through a temporary file and a rename so no reader sees half a file."""
    atomicfile.write_text(path, text)


def _fmt(value: Any) -> str:
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


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """An HTML table with every cell escaped; numbers right-aligned."""
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for v in row:
            cls = ' class="num"' if isinstance(v, int | float | np.number) or v is None else ""
            cells.append(f"<td{cls}>{html.escape(_fmt(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def _flatten(data: Mapping[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    """Nested dicts as (dotted key, value) pairs so a generic table loses nothing."""
    out: list[tuple[str, Any]] = []
    for key, value in data.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            out.extend(_flatten(value, name + "."))
        else:
            out.append((name, value))
    return out


def _kv_table(data: Mapping[str, Any]) -> str:
    """A generic key/value table of a (possibly nested) dict."""
    return _table(("key", "value"), _flatten(data))


def _image(paths: Mapping[str, Path], name: str, alt: str) -> str:
    """An <img> with the PNG embedded as a base64 data URI, or a note when there is none."""
    if name not in paths:
        return "<p>No data for this chart.</p>"
    data = base64.b64encode(paths[name].read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'


def _section(sid: str, heading: str, body: str) -> str:
    """One report section with an id anchor."""
    return f'<section id="{sid}"><h2>{html.escape(heading)}</h2>{body}</section>'


def _clue_html(clue: Mapping[str, Any], paths: Mapping[str, Path]) -> str:
    """Clue level: top-1 and MRR (BM25 vs reranked), recall@k, top-candidate calibration."""
    intro = (
        "What an application acts on: is the first candidate right? The top candidate is the "
        "reranked first candidate of each clue; its probability is checked against being right."
    )
    parts = [
        f"<p>{html.escape(intro)}</p>",
        _table(
            ("clue-level metric", "BM25 order", "reranked"),
            [
                ("top-1 accuracy", clue.get("top1_bm25"), clue.get("top1_reranked")),
                ("MRR", clue.get("mrr_bm25"), clue.get("mrr_reranked")),
            ],
        ),
    ]
    recall = clue.get("recall_at_k") or {}
    parts.append(_table(("k", "recall@k (BM25 order)"), [(str(k), v) for k, v in recall.items()]))
    parts.append(_table(("metric", "value"), [(k, clue.get(k)) for k in CLUE_SUMMARY_KEYS]))
    parts.append(_image(paths, "reliability_top", "reliability of the top candidate"))
    extra = {k: v for k, v in clue.items() if k not in CLUE_SHOWN}
    if extra:
        parts.append("<h3>Other clue-level values</h3>" + _kv_table(extra))
    return "".join(parts)


def _candidate_html(cand: Mapping[str, Any], paths: Mapping[str, Path]) -> str:
    """Candidate level: model vs BM25-only vs every-candidate-wrong, with the imbalance note."""
    models = [m for m in CANDIDATE_MODELS if isinstance(cand.get(m), Mapping)]
    models += [m for m, v in cand.items() if m not in models and isinstance(v, Mapping)]
    keys = list(CANDIDATE_KEYS)
    for m in models:
        keys += [k for k in cand[m] if k not in keys]
    rate = next((cand[m].get("positive_rate") for m in models if "positive_rate" in cand[m]), None)
    here = f" Here {100 * (1 - rate):.1f}% of candidates are wrong." if rate is not None else ""
    note = (
        "With about 20 candidates per clue, about 95% of candidates are wrong, so accuracy and "
        "ECE at this level flatter any model: calling every candidate wrong already scores "
        f"about 0.95 accuracy.{here} Compare against the baselines, and prefer the clue level."
    )
    parts = [f'<p class="note">{html.escape(note)}</p>']
    parts.append(
        _table(("metric", *models), [(k, *(cand[m].get(k) for m in models)) for k in keys])
    )
    parts.append(_image(paths, "reliability_candidate", "reliability of every candidate"))
    extra = {k: v for k, v in cand.items() if k not in models}
    if extra:
        parts.append("<h3>Other candidate-level values</h3>" + _kv_table(extra))
    return "".join(parts)


def _rows_html(rows: Sequence[Mapping[str, Any]], known: Sequence[str]) -> str:
    """A table of dict rows: known columns first, then any other keys found."""
    cols = list(known)
    for r in rows:
        cols += [k for k in r if k not in cols]
    return _table(cols, [[r.get(c) for c in cols] for r in rows]) if rows else "<p>No rows.</p>"


def write_report(
    out_dir: Any,
    metrics: dict[str, Any],
    *,
    reliability_candidate: list[dict[str, Any]],
    reliability_top: list[dict[str, Any]],
    prefix_rows: list[dict[str, Any]],
    ablation_rows: list[dict[str, Any]],
    inlinks: Any,
    labels: Any,
    unresolved: list[dict[str, Any]],
    title: str = "hunchwise evaluation",
) -> dict[str, Path]:
    """Write metrics.json, tables.json, the PNG charts and a self-contained report.html."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {"metrics": out / "metrics.json", "tables": out / "tables.json"}
    _write_atomic(paths["metrics"], json.dumps(to_jsonable(metrics), indent=2, allow_nan=False))
    tables = {
        "reliability_candidate": reliability_candidate,
        "reliability_top": reliability_top,
        "prefix_rows": prefix_rows,
        "ablation_rows": ablation_rows,
        "unresolved": unresolved,
    }
    _write_atomic(paths["tables"], json.dumps(to_jsonable(tables), indent=2, allow_nan=False))

    if reliability_top:
        paths["reliability_top"] = plots.reliability_diagram(
            reliability_top, out / "reliability_top.png", "top candidate per clue"
        )
    if reliability_candidate:
        paths["reliability_candidate"] = plots.reliability_diagram(
            reliability_candidate, out / "reliability_candidate.png", "every candidate"
        )
    if prefix_rows:
        paths["prefix"] = plots.prefix_curves(prefix_rows, out / "prefix.png")
    if ablation_rows:
        paths["ablation"] = plots.ablation_chart(ablation_rows, out / "ablation.png")
    if len(np.asarray(inlinks)):
        paths["inlinks"] = plots.inlink_distributions(inlinks, labels, out / "inlinks.png")

    sections = [
        _section("clue-level", "Clue level", _clue_html(metrics.get("clue") or {}, paths)),
        _section(
            "candidate-level",
            "Candidate level",
            _candidate_html(metrics.get("candidate") or {}, paths),
        ),
        _section(
            "by-prefix",
            "By share of the clue revealed",
            _rows_html(prefix_rows, PREFIX_KEYS) + _image(paths, "prefix", "prefix curves"),
        ),
        _section(
            "ablation",
            "Feature ablation",
            _rows_html(ablation_rows, ABLATION_KEYS) + _image(paths, "ablation", "ablation"),
        ),
        _section("inlinks", "In-link distributions", _image(paths, "inlinks", "in-links")),
        _section(
            "unresolved",
            f"Unresolved gold answers ({len(unresolved)})",
            f"<p>{len(unresolved)} gold answers matched no article.</p>"
            + _rows_html(unresolved, ("line", "file", "answer")),
        ),
    ]
    sections.append(speed_section(metrics, out))
    for key, value in metrics.items():
        if key not in ("clue", "candidate", "speed"):
            body = _kv_table(value) if isinstance(value, Mapping) else _kv_table({key: value})
            sid = "extra-" + re.sub(r"[^A-Za-z0-9_-]+", "-", str(key))
            sections.append(_section(sid, str(key), body))
    doc = (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head>"
        f"<body><h1>{html.escape(title)}</h1>{''.join(sections)}</body></html>\n"
    )
    paths["report"] = out / "report.html"
    _write_atomic(paths["report"], doc)
    return paths


def _text_table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A fixed-width plain-text table."""
    cells = [list(header)] + [[_fmt(v) for v in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def summary_text(metrics: dict[str, Any], ablation_rows: list[dict[str, Any]]) -> str:
    """Short terminal summary: clue-level, candidate-level and ablation tables."""
    clue = metrics.get("clue") or {}
    rows: list[tuple[Any, ...]] = [
        ("top-1 accuracy", clue.get("top1_bm25"), clue.get("top1_reranked")),
        ("MRR", clue.get("mrr_bm25"), clue.get("mrr_reranked")),
    ]
    rows += [(f"recall@{k}", v, "") for k, v in (clue.get("recall_at_k") or {}).items()]
    parts = ["clue level", _text_table(("metric", "BM25 order", "reranked"), rows)]
    if any(k in clue for k in CLUE_SUMMARY_KEYS):
        kv = [(k, clue[k]) for k in CLUE_SUMMARY_KEYS if k in clue]
        parts += ["", _text_table(("clue-level value", ""), kv)]
    cand = metrics.get("candidate") or {}
    models = [m for m in CANDIDATE_MODELS if isinstance(cand.get(m), Mapping)]
    if models:
        table_rows = [(k, *(cand[m].get(k) for m in models)) for k in CANDIDATE_KEYS]
        parts += ["", "candidate level", _text_table(("metric", *models), table_rows)]
    if ablation_rows:
        cols = ("name", "kind", "log_loss", "brier", "roc_auc", "top1", "ece")
        abl = [[r.get(c) for c in cols] for r in ablation_rows]
        parts += ["", "feature ablation", _text_table(cols, abl)]
    return "\n".join(parts) + "\n"
