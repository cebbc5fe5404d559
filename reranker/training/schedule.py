"""Tuning a threshold per share of the clue revealed, and comparing it with two simple rules.

Three rules, each replayed on held-out prefixes (`reranker.decision.Prefixes`):

- "schedule": answer at the first prefix whose top probability clears the threshold of its
  share bin (tuned here, by coordinate search over the bins);
- "one threshold": answer at the first prefix that clears one threshold (tuned on a grid);
- "whole clue": always wait for the whole clue, then answer if the top clears a threshold.

A coordinate search (one bin at a time over a grid, until no bin improves) rather than a
general optimiser: the mean payoff is a step function of the thresholds, which gradient or
simplex methods cannot climb. It starts from the best single threshold and from the best
whole-clue rule, so on the data it is tuned on it is never worse than either.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..decision import Payoff, Prefixes
from ..schedule import ThresholdSchedule

# Thresholds tried; 1.0 never answers (probabilities are kept below 1).
GRID: np.ndarray = np.asarray(np.round(np.r_[np.linspace(0.05, 0.99, 95), 1.0], 6))
MAX_BINS = 10  # more distinct shares than this are binned by tenths
MAX_SWEEPS = 20


def share_bins(fraction: np.ndarray) -> tuple[float, ...]:
    """Upper edges of the share bins: the distinct shares of the prefixes, or tenths."""
    shares = np.unique(np.round(np.asarray(fraction, dtype=np.float64), 9))
    if 0 < shares.size <= MAX_BINS and shares[-1] == 1.0:
        return tuple(float(s) for s in shares)
    return tuple(round(0.1 * i, 1) for i in range(1, 11))


def replay_rows(tops: dict[str, np.ndarray]) -> Prefixes:
    """The per-prefix tops of `train.prefix_tops`, ready to replay."""
    return Prefixes(
        tops["clue"],
        tops["fraction"],
        tops["prob"],
        tops["right"],
        words=tops.get("words"),
        none=tops.get("none"),
    )


def _best_threshold(
    rows: Prefixes, payoff: Payoff, grid: np.ndarray, *, whole_clue_only: bool = False
) -> tuple[float, dict[str, float]]:
    best: tuple[float, dict[str, float]] | None = None
    for t in grid:
        res = rows.play(float(t), payoff, whole_clue_only=whole_clue_only)
        if best is None or res["mean_payoff"] > best[1]["mean_payoff"] + 1e-12:
            best = (float(t), res)
    if best is None:
        raise ValueError("empty threshold grid")
    return best


def _climb(
    rows: Prefixes,
    bins: np.ndarray,
    start: np.ndarray,
    payoff: Payoff,
    none_abstain: float | None,
    grid: np.ndarray,
) -> tuple[np.ndarray, dict[str, float]]:
    """Coordinate search: the best threshold of each bin in turn, the others held."""
    thr = start.copy()
    best = rows.play(thr[bins], payoff, none_abstain=none_abstain)
    for _ in range(MAX_SWEEPS):
        improved = False
        for b in range(thr.size):
            for t in grid:
                if t == thr[b]:
                    continue
                trial = thr.copy()
                trial[b] = t
                res = rows.play(trial[bins], payoff, none_abstain=none_abstain)
                if res["mean_payoff"] > best["mean_payoff"] + 1e-12:
                    thr, best, improved = trial, res, True
        if not improved:
            break
    return thr, best


def tune_schedule(
    rows: Prefixes,
    payoff: Payoff,
    *,
    none_abstain: float | None = None,
    grid: np.ndarray = GRID,
) -> tuple[ThresholdSchedule, dict[str, Any]]:
    """The schedule with the best mean payoff on `rows`, and the three rules' results there."""
    shares = share_bins(rows.fraction)
    schedule0 = ThresholdSchedule(shares, tuple(0.5 for _ in shares))
    bins = schedule0.bin_of(rows.fraction)
    # The one-threshold rule on the grid `tune_threshold` uses (never answering is not a rule).
    single_t, single = _best_threshold(rows, payoff, grid[grid < 1.0])
    wait_t, wait = _best_threshold(rows, payoff, grid, whole_clue_only=True)
    starts = [np.full(len(shares), single_t), np.r_[np.ones(len(shares) - 1), wait_t]]
    climbed = [_climb(rows, bins, s, payoff, none_abstain, grid) for s in starts]
    thr, best = max(climbed, key=lambda c: c[1]["mean_payoff"])
    schedule = ThresholdSchedule(shares, tuple(float(t) for t in thr), none_abstain)
    rules = {
        "schedule": {**best, **schedule.to_dict()},
        "one_threshold": {**single, "threshold": single_t},
        "whole_clue": {**wait, "threshold": wait_t},
    }
    return schedule, rules


def compare_rules(
    rows: Prefixes,
    payoff: Payoff,
    *,
    schedule: ThresholdSchedule | None,
    single: float,
    wait: float,
    grid: np.ndarray = GRID,
) -> dict[str, Any]:
    """The three rules at given thresholds on `rows`, and mean payoff against the threshold.

    For a report on held-out data: nothing is tuned here. Without a schedule (older model
    files) the "schedule" rule is left out.
    """
    rules: dict[str, Any] = {}
    if schedule is not None:
        res = rows.play(schedule.per_row(rows.fraction), payoff, none_abstain=schedule.none_abstain)
        rules["schedule"] = {**res, **schedule.to_dict()}
    rules["one_threshold"] = {**rows.play(single, payoff), "threshold": single}
    rules["whole_clue"] = {
        **rows.play(wait, payoff, whole_clue_only=True),
        "threshold": wait,
    }
    curve = [
        {
            "threshold": float(t),
            "one_threshold": rows.play(float(t), payoff)["mean_payoff"],
            "whole_clue": rows.play(float(t), payoff, whole_clue_only=True)["mean_payoff"],
        }
        for t in grid
    ]
    return {"payoff": payoff.to_dict(), "rules": rules, "curve": curve}
