"""Tuning a threshold per share revealed: never worse than the two simple rules beside it."""

from __future__ import annotations

import numpy as np
import pytest

from reranker.decision import Payoff, Prefixes
from reranker.training.schedule import compare_rules, share_bins, tune_schedule


def _plain_replay(
    rows: list[tuple[int, float, float, int]], thr: dict[float, float], pay: Payoff
) -> float:
    """Mean payoff by walking each clue's prefixes in order (the definition, written plainly)."""
    total, clues = 0.0, sorted({r[0] for r in rows})
    for c in clues:
        for _, share, p, right in sorted((r for r in rows if r[0] == c), key=lambda r: r[1]):
            if p >= thr[share]:
                total += pay.reward * (1 - pay.reward_fall * share) if right else -pay.penalty
                break
    return total / len(clues)


def _random_rows(seed: int) -> list[tuple[int, float, float, int]]:
    # Probabilities that grow with the share revealed, and answers right more often late.
    rng = np.random.default_rng(seed)
    rows = []
    for c in range(60):
        base = rng.random() * 0.5
        for share in (0.2, 0.4, 0.6, 0.8, 1.0):
            p = min(0.99, base + share * rng.random())
            rows.append((c, share, p, int(rng.random() < 0.3 + 0.6 * share * p)))
    return rows


def _prefixes(rows: list[tuple[int, float, float, int]]) -> Prefixes:
    c, f, p, r = (np.array(v) for v in zip(*rows, strict=True))
    return Prefixes(c, f, p, r.astype(bool))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("fall", [0.0, 0.5, 1.0])
def test_schedule_beats_or_equals_both_simple_rules_where_tuned(seed: int, fall: float) -> None:
    rows = _random_rows(seed)
    pay = Payoff(1, 1, reward_fall=fall)
    schedule, rules = tune_schedule(_prefixes(rows), pay)
    assert schedule.shares == (0.2, 0.4, 0.6, 0.8, 1.0)
    best = rules["schedule"]["mean_payoff"]
    assert best >= rules["one_threshold"]["mean_payoff"] - 1e-12
    assert best >= rules["whole_clue"]["mean_payoff"] - 1e-12
    # what tuning reports is what walking the clues under that schedule gives
    thr = dict(zip(schedule.shares, schedule.thresholds, strict=True))
    assert best == pytest.approx(_plain_replay(rows, thr, pay))
    one = {s: rules["one_threshold"]["threshold"] for s in schedule.shares}
    assert rules["one_threshold"]["mean_payoff"] == pytest.approx(_plain_replay(rows, one, pay))


def test_schedule_strictly_beats_one_threshold_when_early_and_late_need_different_bars() -> None:
    # Early prefixes are right at 0.7 and wrong at 0.6; late ones right from 0.6.
    #   clue 0: 0.5 -> 0.70 right, 1.0 -> 0.90 right
    #   clue 1: 0.5 -> 0.60 wrong, 1.0 -> 0.62 right
    # Reward falls by half: right at half the clue 0.75, on the whole clue 0.5; wrong -1.
    # One threshold t: t <= 0.6 answers clue 1 early and wrong: (0.75 - 1) / 2 = -0.125;
    # 0.6 < t <= 0.62: clue 0 early +0.75, clue 1 late +0.5 -> 0.625 (not on the grid here);
    # 0.62 < t <= 0.7: (0.75 + 0) / 2 = 0.375; 0.7 < t <= 0.9: 0.5 / 2 = 0.25.
    # Schedule (0.65 early, 0.55 late): +0.75 and +0.5 -> 0.625.
    rows = [(0, 0.5, 0.70, 1), (0, 1.0, 0.90, 1), (1, 0.5, 0.60, 0), (1, 1.0, 0.62, 1)]
    grid = np.array([0.55, 0.65, 0.75, 0.95, 1.0])
    schedule, rules = tune_schedule(_prefixes(rows), Payoff(1, 1, reward_fall=0.5), grid=grid)
    assert rules["one_threshold"]["mean_payoff"] == pytest.approx(0.375)
    assert rules["schedule"]["mean_payoff"] == pytest.approx(0.625)
    assert schedule.thresholds[0] == 0.65 and schedule.thresholds[1] <= 0.55


def test_compare_rules_draws_a_curve_and_applies_the_given_thresholds() -> None:
    rows = _random_rows(5)
    pay = Payoff(1, 2, reward_fall=0.3)
    schedule, _ = tune_schedule(_prefixes(rows), pay)
    out = compare_rules(_prefixes(rows), pay, schedule=schedule, single=0.7, wait=0.6)
    assert set(out["rules"]) == {"schedule", "one_threshold", "whole_clue"}
    assert out["rules"]["one_threshold"]["threshold"] == 0.7
    at = next(r for r in out["curve"] if r["threshold"] == pytest.approx(0.7))
    assert at["one_threshold"] == pytest.approx(out["rules"]["one_threshold"]["mean_payoff"])
    assert (
        "schedule"
        not in compare_rules(_prefixes(rows), pay, schedule=None, single=0.7, wait=0.6)["rules"]
    )


def test_share_bins_are_the_prefix_shares_or_tenths() -> None:
    assert share_bins(np.array([0.4, 0.2, 1.0, 0.2])) == (0.2, 0.4, 1.0)
    assert share_bins(np.linspace(0.05, 1.0, 20)) == tuple(round(0.1 * i, 1) for i in range(1, 11))
