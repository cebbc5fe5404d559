"""Tests of reranker.training.plots: real PNG files on disk, read back with matplotlib."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.image as mpimg
import numpy as np
import pytest

from reranker.training import plots
from reranker.training.measures import reliability_table

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature, RFC 2083 section 3.1


def _check_png(path: Path) -> np.ndarray:
    """The file is a PNG that matplotlib decodes to a sizeable, non-blank RGBA image."""
    assert path.is_file()
    assert path.read_bytes()[:8] == PNG_MAGIC
    img = mpimg.imread(path)
    assert img.ndim == 3 and img.shape[0] >= 200 and img.shape[1] >= 200
    assert float(img[..., :3].std()) > 0.01, "image is blank"
    assert not list(path.parent.glob(".*.tmp")), "temporary file left behind"
    return img


def test_reliability_diagram_with_empty_bins(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    p = rng.random(300) * 0.6  # bins above 0.6 stay empty (None means)
    y = (rng.random(300) < p).astype(int)
    out = plots.reliability_diagram(reliability_table(y, p), tmp_path / "sub" / "rel.png", "t")
    assert out == tmp_path / "sub" / "rel.png"
    _check_png(out)


def test_reliability_diagram_rejects_empty_table(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="empty"):
        plots.reliability_diagram([], tmp_path / "x.png", "t")
    assert not (tmp_path / "x.png").exists()


def test_prefix_curves(tmp_path: Path) -> None:
    rows = [
        {
            "fraction": f,
            "n_clues": 10,
            "top1_accuracy": 0.2 + 0.6 * f,
            "commit_rate": f,
            "accuracy_when_committed": None if f < 0.3 else 0.5 + 0.4 * f,
            "mean_payoff": -0.5 + f,
        }
        for f in (1.0, 0.2, 0.4, 0.6, 0.8)
    ]
    _check_png(plots.prefix_curves(rows, tmp_path / "prefix.png"))
    with pytest.raises(ValueError):
        plots.prefix_curves([], tmp_path / "none.png")


def test_inlink_distributions(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    inlinks = np.floor(rng.pareto(1.2, size=2000) * 5)
    labels = rng.random(2000) < 0.05
    _check_png(plots.inlink_distributions(inlinks, labels, tmp_path / "in.png"))
    # one class only still draws
    _check_png(plots.inlink_distributions(inlinks[:50], np.zeros(50), tmp_path / "in1.png"))
    with pytest.raises(ValueError, match="equal length"):
        plots.inlink_distributions(inlinks, labels[:10], tmp_path / "bad.png")
    with pytest.raises(ValueError, match=">= 0"):
        plots.inlink_distributions([-1.0, 2.0], [0, 1], tmp_path / "bad.png")


def test_ablation_chart(tmp_path: Path) -> None:
    rows: list[dict[str, Any]] = [
        {
            "name": "bm25 only",
            "kind": "baseline",
            "features": ["bm25"],
            "log_loss": 0.2,
            "top1": 0.4,
        },
        {"name": "+inlinks", "kind": "forward", "features": ["bm25", "inl"], "log_loss": 0.15},
        {
            "name": "-inlinks",
            "kind": "drop-one",
            "features": ["bm25"],
            "log_loss": None,
            "top1": 0.5,
        },
        {"name": "all", "kind": "full", "features": ["bm25", "inl"], "log_loss": 0.1, "top1": 0.6},
    ]
    _check_png(plots.ablation_chart(rows, tmp_path / "abl.png"))


def test_overwrite_replaces_file(tmp_path: Path) -> None:
    target = tmp_path / "p.png"
    target.write_bytes(b"old")
    rows = [{"fraction": 1.0, "top1_accuracy": 0.5, "commit_rate": 0.5, "mean_payoff": 0.1}]
    _check_png(plots.prefix_curves(rows, target))


def test_reliability_diagram_draws_the_wilson_intervals(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    p = rng.random(80)
    y = (rng.random(80) < p).astype(int)
    table = reliability_table(y, p)
    bare = [{k: v for k, v in r.items() if k not in ("ci_low", "ci_high")} for r in table]
    with_bars = _check_png(plots.reliability_diagram(table, tmp_path / "bars.png", "t"))
    without = _check_png(plots.reliability_diagram(bare, tmp_path / "bare.png", "t"))
    # Same bins, same points: only the error bars (and the legend's wording) differ.
    assert with_bars.shape == without.shape
    assert np.abs(with_bars - without).sum() > 0
