"""The evaluation report: metrics.json, PNG charts and one self-contained report.html.

The page opens with what was trained and what was evaluated, any warning (a comparison the
model loses), and how every baseline and ablation row was fitted; the sections themselves are
built in `report_sections`, the HTML pieces in `report_html`.
"""

from __future__ import annotations

import html
import json
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from retriever import atomicfile

from . import plots
from . import report_sections as S
from .report_html import CSS, fmt, image, kv_table, rows_html, section, to_jsonable
from .report_speed import speed_section

__all__ = ["summary_text", "to_jsonable", "write_report"]

PREFIX_KEYS = (
    "fraction",
    "n_clues",
    "top1_accuracy",
    "commit_rate",
    "accuracy_when_committed",
    "mean_payoff",
)
PREFIX_LABELS = {
    "fraction": "share revealed",
    "n_clues": "clues",
    "top1_accuracy": "top-1 accuracy",
    "commit_rate": "answered",
    "accuracy_when_committed": "right when answered",
    "mean_payoff": "mean payoff",
}
# metrics keys with a section of their own (the rest are shown generically at the end)
OWN_SECTIONS = (
    "about",
    "warnings",
    "baselines",
    "clue",
    "candidate",
    "worst_missed",
    "speed",
    "reliability",  # its bins are the tables under the two reliability diagrams
)


def heading(key: str) -> str:
    """A metrics key as a heading in the page's style: sentence case, words not underscores."""
    words = key.replace("_", " ").strip() or key
    return words[:1].upper() + words[1:]


def _json(data: Any) -> str:
    """Plain JSON text (NaN and infinities as null, as JSON has neither)."""
    return json.dumps(to_jsonable(data), indent=2, allow_nan=False)


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
    atomicfile.write_text(paths["metrics"], _json(metrics))
    tables = {
        "reliability_candidate": reliability_candidate,
        "reliability_top": reliability_top,
        "prefix_rows": prefix_rows,
        "ablation_rows": ablation_rows,
        "unresolved": unresolved,
    }
    atomicfile.write_text(paths["tables"], _json(tables))

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

    about = metrics.get("about") or {}
    fitting = about.get("fitting") or {}
    groups = (about.get("model") or {}).get("feature_groups") or {}
    warnings = metrics.get("warnings") or []
    header = S.header_html(about) if about else ""
    rows = ablation_rows
    sections = [
        section("warnings", f"Warnings ({len(warnings)})", S.warnings_html(warnings, bool(rows))),
        section(
            "about",
            "What was trained, what was evaluated, how each row was fitted",
            header + S.baselines_html(metrics.get("baselines") or [], fitting),
        ),
        section("clue-level", "Clue level", S.clue_html(metrics.get("clue") or {}, paths)),
        section(
            "candidate-level",
            "Candidate level",
            S.candidate_html(metrics.get("candidate") or {}, paths, reliability_candidate),
        ),
        section(
            "by-prefix",
            "By share of the clue revealed",
            rows_html(prefix_rows, PREFIX_KEYS, PREFIX_LABELS)
            + image(paths, "prefix", "rates and payoff against the share revealed"),
        ),
        section(
            "ablation",
            "Feature ablation",
            S.ablation_html(ablation_rows, groups, fitting.get("ablation"))
            + image(paths, "ablation", "log-loss and top-1 accuracy per ablation row"),
        ),
        section(
            "worst-missed",
            "Worst-missed clues",
            S.worst_missed_html(metrics.get("worst_missed") or []),
        ),
        section(
            "inlinks",
            "In-link distributions",
            image(paths, "inlinks", "in-link histograms of right and wrong candidates"),
        ),
        section(
            "unresolved",
            f"Unresolved gold answers ({len(unresolved)})",
            f"<p>{len(unresolved)} gold answers matched no article.</p>"
            + rows_html(unresolved, ("line", "file", "answer"))
            if unresolved
            else "<p>Every gold answer matched an article.</p>",
        ),
    ]
    sections.append(speed_section(metrics, out))
    for key, value in metrics.items():
        if key not in OWN_SECTIONS:
            body = kv_table(value) if isinstance(value, Mapping) else kv_table({key: value})
            sid = "extra-" + re.sub(r"[^A-Za-z0-9_-]+", "-", str(key))
            sections.append(section(sid, heading(str(key)), body))
    doc = (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head>"
        f"<body><h1>{html.escape(title)}</h1>{''.join(sections)}</body></html>\n"
    )
    paths["report"] = out / "report.html"
    atomicfile.write_text(paths["report"], doc)
    return paths


def _text_table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A fixed-width plain-text table."""
    cells = [list(header)] + [[fmt(v) for v in row] for row in rows]
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
    if any(k in clue for k in S.CLUE_SUMMARY_KEYS):
        kv = [(k, clue[k]) for k in S.CLUE_SUMMARY_KEYS if k in clue]
        parts += ["", _text_table(("clue-level value", ""), kv)]
    cand = metrics.get("candidate") or {}
    models = [m for m in S.CANDIDATE_MODELS if isinstance(cand.get(m), Mapping)]
    if models:
        table_rows = [(k, *(cand[m].get(k) for m in models)) for k in S.CANDIDATE_KEYS]
        parts += ["", "candidate level", _text_table(("metric", *models), table_rows)]
    if ablation_rows:
        cols = ("name", "kind", "log_loss", "clue_log_loss", "brier", "roc_auc", "top1", "ece")
        abl = [[r.get(c) for c in cols] for r in ablation_rows]
        parts += ["", "feature ablation", _text_table(cols, abl)]
    return "\n".join(parts) + "\n"
