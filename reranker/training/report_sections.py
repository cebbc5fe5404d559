"""The sections of report.html: header, warnings, baselines, clue and candidate level, ablation,
worst-missed clues. Each takes plain data (what metrics.json holds) and returns escaped HTML."""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .report_html import image, kv_table, paragraph, sig, table

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
ABLATION_FIGURES = ("log_loss", "clue_log_loss", "brier", "roc_auc", "top1", "ece")
ABLATION_LABELS = ("log-loss", "clue-level log-loss", "Brier", "ROC AUC", "top-1", "ECE")
BEATS = (("top1", "top-1", True), ("clue_log_loss", "clue log-loss", False))
CLUE_TEXT = 140  # characters of a clue shown in the worst-missed table


def header_html(about: Mapping[str, Any]) -> str:
    """What the model was trained on and what was evaluated, in words."""
    m, e = about.get("model") or {}, about.get("evaluation") or {}
    groups = m.get("feature_groups") or {}
    rows = [
        ("model version", m.get("version")),
        ("trained at", m.get("trained_at")),
        ("trained on", ", ".join(m.get("training_logs") or []) or None),
        ("training clues", m.get("training_clues")),
        ("candidates per clue (k)", m.get("k")),
        ("feature groups", ", ".join(f"{g} ({len(v)})" for g, v in groups.items()) or None),
        ("calibration", m.get("calibration")),
        ("evaluated on", ", ".join(e.get("logs") or []) or None),
        ("evaluated clues", e.get("clues")),
        ("candidate rows", e.get("candidate_rows")),
        ("evaluated at", e.get("evaluated_at")),
        ("index version", e.get("index_version")),
    ]
    return table(("what", "value"), [(k, v) for k, v in rows if v is not None])


def warnings_html(warnings: Sequence[Mapping[str, Any]], ablation_run: bool) -> str:
    """Every comparison the model loses, as a red box; a green line when it loses none."""
    if warnings:
        items = "".join(f"<li>{html.escape(str(w.get('message')))}</li>" for w in warnings)
        return (
            '<div class="warning"><strong>Warning: the model does not win every comparison.'
            f"</strong><ul>{items}</ul></div>"
        )
    made = "the two baselines" + (" and each feature group alone" if ablation_run else "")
    return paragraph(
        f"The model loses none of the comparisons made ({made}, on top-1 and clue-level log-loss).",
        "fine",
    )


def baselines_html(rows: Sequence[Mapping[str, Any]], fitting: Mapping[str, str]) -> str:
    """The model beside both baselines, each with how it was fitted, and the ablation's note."""
    body = table(
        ("", "top-1", "MRR", "clue-level log-loss", "candidate log-loss", "how it was fitted"),
        [
            (
                r.get("name"),
                r.get("top1"),
                r.get("mrr"),
                r.get("clue_log_loss"),
                r.get("log_loss"),
                r.get("fitted"),
            )
            for r in rows
        ],
    )
    note = fitting.get("ablation")
    return body + (paragraph("Feature ablation: " + note, "note") if note else "")


def reliability_html(bins: Sequence[Mapping[str, Any]]) -> str:
    """The bins of a reliability diagram with their 95% Wilson intervals."""
    shown = [b for b in bins if b.get("count")]
    if not shown:
        return ""
    return table(
        ("probability bin", "count", "mean probability", "share right", "95% interval"),
        [
            (
                f"{b['lo']:.1f}-{b['hi']:.1f}",
                b["count"],
                b.get("mean_prob"),
                b.get("frac_positive"),
                f"{sig(b['ci_low'])}-{sig(b['ci_high'])}" if b.get("ci_low") is not None else None,
            )
            for b in shown
        ],
    )


WILSON = (
    "Error bars and intervals: 95% Wilson (1927) score intervals of the share right in each "
    "bin; a bin whose interval misses its mean probability is miscalibrated beyond chance."
)


def clue_html(clue: Mapping[str, Any], paths: Mapping[str, Path]) -> str:
    """Clue level: top-1 and MRR (BM25 vs reranked), recall@k, top-candidate calibration."""
    intro = (
        "What an application acts on: is the first candidate right? The top candidate is the "
        "reranked first candidate of each clue; its probability is checked against being right."
    )
    parts = [
        paragraph(intro),
        table(
            ("clue-level metric", "BM25 order", "reranked"),
            [
                ("top-1 accuracy", clue.get("top1_bm25"), clue.get("top1_reranked")),
                ("MRR", clue.get("mrr_bm25"), clue.get("mrr_reranked")),
            ],
        ),
    ]
    recall = clue.get("recall_at_k") or {}
    parts.append(table(("k", "recall@k (BM25 order)"), [(str(k), v) for k, v in recall.items()]))
    parts.append(table(("metric", "value"), [(k, clue.get(k)) for k in CLUE_SUMMARY_KEYS]))
    parts.append(image(paths, "reliability_top", "reliability of the top candidate"))
    parts.append(paragraph(WILSON))
    parts.append(reliability_html(clue.get("top_candidate_reliability") or []))
    extra = {k: v for k, v in clue.items() if k not in CLUE_SHOWN}
    if extra:
        parts.append("<h3>Other clue-level values</h3>" + kv_table(extra))
    return "".join(parts)


def candidate_html(
    cand: Mapping[str, Any], paths: Mapping[str, Path], bins: Sequence[Mapping[str, Any]] = ()
) -> str:
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
    parts = [paragraph(note, "note")]
    parts.append(table(("metric", *models), [(k, *(cand[m].get(k) for m in models)) for k in keys]))
    parts.append(image(paths, "reliability_candidate", "reliability of every candidate"))
    if bins:
        parts += [paragraph(WILSON), reliability_html(bins)]
    extra = {k: v for k, v in cand.items() if k not in models}
    if extra:
        parts.append("<h3>Other candidate-level values</h3>" + kv_table(extra))
    return "".join(parts)


def ablation_html(
    rows: Sequence[Mapping[str, Any]], groups: Mapping[str, Sequence[str]], note: str | None
) -> str:
    """Ablation rows by feature-group name; each group's features listed once below."""
    if not rows:
        return "<p>No rows (the ablation was not run).</p>"
    full = next((r for r in rows if r.get("kind") == "full"), {})
    body = []
    for r in rows:
        beats = [
            label
            for key, label, higher in BEATS
            if r.get("kind") != "full"
            and r.get(key) is not None
            and full.get(key) is not None
            and (r[key] > full[key] if higher else r[key] < full[key])
        ]
        used = r.get("groups") or []
        body.append(
            (
                r.get("name"),
                r.get("kind"),
                " + ".join(used) if used else None,
                len(r.get("features") or []),
                *(r.get(k) for k in ABLATION_FIGURES),
                ", ".join(beats) if r.get("kind") in ("baseline", "alone") else "",
            )
        )
    header = ("row", "kind", "feature groups", "features", *ABLATION_LABELS, "beats full on")
    parts = [paragraph(note[:1].upper() + note[1:], "note")] if note else []
    parts.append(table(header, body))
    if groups:
        parts.append("<h3>Feature groups</h3>")
        parts.append(table(("group", "features"), [(g, list(v)) for g, v in groups.items()]))
    return "".join(parts)


def worst_missed_html(rows: Sequence[Mapping[str, Any]]) -> str:
    """The clues whose right answer is furthest down the list or not in it, worst first."""
    if not rows:
        return "<p>None: every clue with an answer has it first.</p>"
    intro = paragraph(
        "Whole clues whose right answer is not first: absent from the candidates first, then "
        "the furthest down. Probabilities are the model's per-clue shares."
    )

    def cand(top: Sequence[Mapping[str, Any]], i: int) -> str | None:
        if i >= len(top):
            return None
        return f"{top[i].get('title')} ({sig(float(top[i].get('probability') or 0))})"

    body = []
    for r in rows:
        clue = str(r.get("clue") or "")
        rank = r.get("answer_rank")
        where = f"not among the {r.get('candidates')}" if rank is None else f"#{rank}"
        top = r.get("top") or []
        p = r.get("answer_probability")
        body.append(
            (
                clue if len(clue) <= CLUE_TEXT else clue[: CLUE_TEXT - 3] + "...",
                r.get("answer_title"),
                where,
                None if p is None else float(p),
                cand(top, 0),
                cand(top, 1),
                cand(top, 2),
                float(r.get("none_of_these") or 0.0),
            )
        )
    header = ("clue", "right answer", "its rank", "its probability", "1st", "2nd", "3rd", "none")
    return intro + table(header, body)
