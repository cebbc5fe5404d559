"""PNG charts of the evaluation: reliability diagrams, prefix curves, in-links, ablations."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import matplotlib

# No display on servers; charts are built on Figure objects, not pyplot, so no global figure
# state is shared between calls or threads.
matplotlib.use("Agg")

import numpy as np
from matplotlib.figure import Figure

from retriever import atomicfile

DPI = 100
KIND_COLORS = {
    "baseline": "#9e9e9e",
    "alone": "#4c72b0",
    "forward": "#55a868",
    "drop-one": "#c44e52",
    "full": "#8172b2",
}


def _save(fig: Figure, path: Any) -> Path:
    """Render `fig` to a temporary PNG beside `path`, then rename it into place."""
    target = Path(path)
    with atomicfile.replacing(target, fsync=False) as tmp:
        fig.savefig(tmp, format="png", dpi=DPI)
    return target


def _num(value: Any) -> float:
    """A float for plotting; None becomes NaN so the point or bar is simply not drawn."""
    return float("nan") if value is None else float(value)


def reliability_diagram(table: Sequence[dict[str, Any]], path: Any, title: str) -> Path:
    """Bars of the share of right answers per probability bin, the diagonal, counts below.

    Where the bins carry ci_low and ci_high (`measures.reliability_table`: 95% Wilson score
    intervals), each bin's point gets them as an error bar.
    """
    if not table:
        raise ValueError("reliability table is empty")
    lo = np.array([_num(r["lo"]) for r in table])
    hi = np.array([_num(r["hi"]) for r in table])
    frac = np.array([_num(r["frac_positive"]) for r in table])
    conf = np.array([_num(r["mean_prob"]) for r in table])
    count = np.array([int(r["count"]) for r in table])

    fig = Figure(figsize=(6, 6.5))
    top, bottom = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    top.bar(
        lo,
        np.nan_to_num(frac),
        width=hi - lo,
        align="edge",
        color="#4c72b0",
        edgecolor="white",
        alpha=0.8,
        label="share right in bin",
    )
    low = np.array([_num(r.get("ci_low")) for r in table])
    high = np.array([_num(r.get("ci_high")) for r in table])
    if np.isfinite(low).any():
        # Bars from the share right down to ci_low and up to ci_high (not drawn where NaN).
        yerr = np.vstack([np.nan_to_num(frac - low), np.nan_to_num(high - frac)])
        top.errorbar(
            conf,
            frac,
            yerr=np.clip(yerr, 0, None),
            fmt="o",
            color="#222222",
            markersize=4,
            capsize=3,
            elinewidth=1,
            label="(mean prob, share right), 95% Wilson interval",
        )
    else:
        top.plot(conf, frac, "o", color="#222222", markersize=4, label="(mean prob, share right)")
    top.plot([0, 1], [0, 1], "--", color="#c44e52", label="perfect calibration")
    top.set_xlim(0, 1)
    top.set_ylim(0, 1)
    top.set_ylabel("share of candidates that are right")
    fig.suptitle(title)
    # Above the axes, so it never covers a bar (bars reach 1.0 where a model is under-confident).
    top.legend(loc="lower center", bbox_to_anchor=(0.5, 1.08), ncol=2, fontsize=8, frameon=False)
    bottom.bar(lo, count, width=hi - lo, align="edge", color="#9e9e9e", edgecolor="white")
    if count.max() > 0 and count.max() > 50 * max(1, int(count[count > 0].min())):
        bottom.set_yscale("log")
    bottom.set_xlabel("predicted probability")
    bottom.set_ylabel("count")
    fig.tight_layout()
    return _save(fig, path)


def prefix_curves(rows: Sequence[dict[str, Any]], path: Any) -> Path:
    """Top-1 accuracy, commit rate, accuracy when committed and mean payoff vs share revealed."""
    if not rows:
        raise ValueError("no prefix rows to plot")
    rows = sorted(rows, key=lambda r: float(r["fraction"]))
    x = np.array([float(r["fraction"]) for r in rows])
    fig = Figure(figsize=(10, 4))
    left, right = fig.subplots(1, 2)
    for key, label in (
        ("top1_accuracy", "top-1 accuracy (reranked)"),
        ("commit_rate", "commit rate"),
        ("accuracy_when_committed", "accuracy when committed"),
    ):
        left.plot(x, [_num(r.get(key)) for r in rows], "o-", label=label)
    left.set_ylim(0, 1.02)
    left.set_xlabel("share of the clue revealed")
    left.set_ylabel("rate")
    left.legend(fontsize=8)
    right.plot(x, [_num(r.get("mean_payoff")) for r in rows], "o-", color="#8172b2")
    right.axhline(0.0, color="#9e9e9e", linewidth=0.8)
    right.set_xlabel("share of the clue revealed")
    right.set_ylabel("mean payoff per clue")
    fig.tight_layout()
    return _save(fig, path)


def inlink_distributions(inlinks: Any, labels: Any, path: Any) -> Path:
    """Two panels: raw in-link counts and log1p(in-links), right vs wrong candidates."""
    counts = np.asarray(inlinks, dtype=float)
    y = np.asarray(labels)
    if counts.ndim != 1 or y.shape != counts.shape:
        raise ValueError(
            f"inlinks and labels must be 1-D of equal length, got {counts.shape}, {y.shape}"
        )
    if len(counts) == 0 or not np.isfinite(counts).all() or counts.min() < 0:
        raise ValueError("inlinks must be a non-empty array of counts >= 0")
    right = y.astype(bool)
    fig = Figure(figsize=(10, 4))
    axes = fig.subplots(1, 2)
    for ax, values, xlabel in (
        (axes[0], counts, "in-links (raw count)"),
        (axes[1], np.log1p(counts), "log1p(in-links)"),
    ):
        edges = np.histogram_bin_edges(values, bins=30)
        for mask, label, color in ((~right, "wrong", "#c44e52"), (right, "right", "#4c72b0")):
            if mask.any():
                ax.hist(
                    values[mask],
                    bins=edges,
                    density=True,
                    alpha=0.55,
                    color=color,
                    label=f"{label} (n={int(mask.sum())})",
                )
        ax.set_xlabel(xlabel)
        ax.set_ylabel("density")
        ax.legend(fontsize=8)
    # A log density axis keeps the long tail of raw counts visible next to the bulk.
    axes[0].set_yscale("log")
    axes[0].set_title("raw in-link counts")
    axes[1].set_title("log1p(in-links)")
    fig.tight_layout()
    return _save(fig, path)


def ablation_chart(rows: Sequence[dict[str, Any]], path: Any) -> Path:
    """Horizontal bars of log-loss and top-1 accuracy per ablation row, coloured by kind."""
    if not rows:
        raise ValueError("no ablation rows to plot")
    names = [f"{r.get('name', '?')} [{r.get('kind', '?')}]" for r in rows]
    colors = [KIND_COLORS.get(str(r.get("kind")), "#dd8452") for r in rows]
    ypos = np.arange(len(rows))
    fig = Figure(figsize=(11, 1.2 + 0.35 * len(rows)))
    axes = fig.subplots(1, 2, sharey=True)
    for ax, key, xlabel in (
        (axes[0], "log_loss", "log-loss (lower is better)"),
        (axes[1], "top1", "top-1 accuracy per clue (higher is better)"),
    ):
        values = np.array([_num(r.get(key)) for r in rows])
        ax.barh(ypos, np.nan_to_num(values), color=colors)
        for yy, v in zip(ypos, values, strict=True):
            ax.text(
                0 if np.isnan(v) else v,
                yy,
                " n/a" if np.isnan(v) else f" {v:.3f}",
                va="center",
                fontsize=7,
            )
        ax.set_xlabel(xlabel)
        # Room right of the longest bar for its label.
        ax.set_xlim(0, 1.18 * max(float(np.nanmax(np.append(values, 0.0))), 1e-9))
    axes[0].set_yticks(ypos, names, fontsize=8)
    axes[0].invert_yaxis()
    fig.tight_layout()
    return _save(fig, path)


def payoff_curve(
    curve: Sequence[dict[str, Any]], rules: dict[str, Any], path: Any, title: str = ""
) -> Path:
    """Mean payoff per clue against the threshold, for one threshold at every prefix and for
    waiting for the whole clue; the schedule's mean payoff as a horizontal line."""
    if not curve:
        raise ValueError("no payoff curve to plot")
    x = np.array([float(r["threshold"]) for r in curve])
    fig = Figure(figsize=(7, 4.5))
    ax = fig.subplots()
    ax.plot(x, [_num(r["one_threshold"]) for r in curve], "-", label="one threshold, any prefix")
    ax.plot(x, [_num(r["whole_clue"]) for r in curve], "-", label="wait for the whole clue")
    for key, label, color in (
        ("one_threshold", "one threshold (chosen)", "#4c72b0"),
        ("whole_clue", "whole clue (chosen)", "#dd8452"),
    ):
        rule = rules.get(key)
        if rule:
            ax.plot([rule["threshold"]], [rule["mean_payoff"]], "o", color=color, label=label)
    if rules.get("schedule"):
        ax.axhline(
            rules["schedule"]["mean_payoff"],
            color="#55a868",
            linestyle="--",
            label="threshold per share revealed",
        )
    ax.axhline(0.0, color="#9e9e9e", linewidth=0.8)
    ax.set_xlabel("threshold")
    ax.set_ylabel("mean payoff per clue")
    if title:
        ax.set_title(title)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _save(fig, path)
