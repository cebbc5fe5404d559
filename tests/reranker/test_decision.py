"""When to answer: break-even thresholds, decide(), committing word by word, tuning."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from reranker import Payoff, decide
from reranker.decision import (
    ABSTAIN,
    ANSWER,
    WAIT,
    Prefixes,
    choose_threshold,
    simulate_commits,
    tune_threshold,
)
from reranker.schedule import ThresholdSchedule


def test_break_even_worked_example() -> None:
    # Answering at probability p pays p * reward - (1 - p) * penalty; abstaining pays 0.
    # Equal when p = penalty / (reward + penalty): reward 1, penalty 3 -> 3/4.
    assert Payoff(1, 3).break_even == 0.75
    assert Payoff(1, 1).break_even == 0.5
    assert Payoff(4, 0).break_even == 0.0  # no penalty: always worth answering
    p = Payoff(2, 5).break_even
    assert p * 2 - (1 - p) * 5 == pytest.approx(0.0)


@pytest.mark.parametrize(("reward", "penalty"), [(0, 1), (-1, 1), (1, -0.5)])
def test_payoff_validation(reward: float, penalty: float) -> None:
    with pytest.raises(ValueError, match="reward > 0 and penalty >= 0"):
        Payoff(reward, penalty)


def test_decide_answer_wait_abstain() -> None:
    d = decide("a1", 0.8, 0.75)
    assert (d.action, d.doc_id, d.probability, d.threshold) == (ANSWER, "a1", 0.8, 0.75)
    assert "0.800 >= threshold 0.750" in d.reason
    assert decide("a1", 0.75, 0.75).action == ANSWER  # at the threshold, answering breaks even
    d = decide("a1", 0.6, 0.75)
    assert (d.action, d.doc_id, d.probability) == (WAIT, None, 0.6)
    assert "0.600 < threshold 0.750" in d.reason
    assert decide("a1", 0.6, 0.75, complete=True).action == ABSTAIN
    assert decide("a1", 0.9, 0.75, complete=True).action == ANSWER


def test_reason_shows_enough_decimals_to_tell_probability_from_threshold() -> None:
    # 0.72988 and 0.73 both read 0.730 at three decimals, which read as "0.730 < 0.730".
    assert "0.7299 < threshold 0.7300" in decide("a1", 0.72988, 0.73).reason
    d = decide(None, None, 0.5)
    assert d.action == WAIT and "no candidates" in d.reason
    assert decide(None, None, 0.5, complete=True).action == ABSTAIN
    d = decide("a1", None, 0.5)
    assert d.action == WAIT and d.doc_id is None and "BM25 only" in d.reason


# Three clues, one row per prefix: (clue, fraction revealed, top probability, top is right).
#   clue 7: 0.2 -> 0.3 wrong, 0.6 -> 0.8 right, 1.0 -> 0.9 right
#   clue 3: 0.5 -> 0.9 wrong, 1.0 -> 0.95 right
#   clue 5: 0.5 -> 0.1 wrong, 1.0 -> 0.2 wrong
ROWS = [
    (7, 0.2, 0.3, 0),
    (7, 0.6, 0.8, 1),
    (7, 1.0, 0.9, 1),
    (3, 0.5, 0.9, 0),
    (3, 1.0, 0.95, 1),
    (5, 0.5, 0.1, 0),
    (5, 1.0, 0.2, 0),
]


def _arrays(
    rows: list[tuple[int, float, float, int]],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    c, f, p, r = zip(*rows, strict=True)
    return np.array(c), np.array(f), np.array(p), np.array(r, dtype=bool)


def test_simulate_commits_by_hand() -> None:
    # Threshold 0.75, payoff +1 / -1:
    #   clue 7 commits at 0.6 (p 0.8 >= 0.75), right: +1
    #   clue 3 commits at 0.5 (p 0.9), wrong: -1
    #   clue 5 never clears 0.75: 0
    # mean payoff 0/3; commit rate 2/3; accuracy 1/2; mean fraction at commit (0.6 + 0.5) / 2.
    # On the full clue only: clue 7 (0.9, right) +1, clue 3 (0.95, right) +1, clue 5 0 -> 2/3.
    rows = list(ROWS)
    np.random.default_rng(0).shuffle(rows)  # input order must not matter
    res = simulate_commits(*_arrays(rows), threshold=0.75, payoff=Payoff(1, 1))
    assert res["mean_payoff"] == pytest.approx(0.0)
    assert res["commit_rate"] == pytest.approx(2 / 3)
    assert res["accuracy_when_committed"] == pytest.approx(0.5)
    assert res["mean_fraction_at_commit"] == pytest.approx(0.55)
    assert res["full_clue_mean_payoff"] == pytest.approx(2 / 3)
    assert res["full_clue_commit_rate"] == pytest.approx(2 / 3)
    assert res["n_clues"] == 3 and res["threshold"] == 0.75
    # With penalty 3 the wrong early commit of clue 3 costs 3: (1 - 3 + 0) / 3.
    res = simulate_commits(*_arrays(ROWS), threshold=0.75, payoff=Payoff(1, 3))
    assert res["mean_payoff"] == pytest.approx(-2 / 3)


def test_simulate_commits_when_nothing_clears() -> None:
    res = simulate_commits(*_arrays(ROWS), threshold=0.99, payoff=Payoff())
    assert res["mean_payoff"] == 0 and res["commit_rate"] == 0
    assert res["mean_fraction_at_commit"] == 1.0 and res["accuracy_when_committed"] == 0.0
    with pytest.raises(ValueError, match="at least one"):
        empty = np.array([])
        simulate_commits(empty, empty, empty, empty, 0.5, Payoff())


def _brute_force_payoff(rows: list[tuple[int, float, float, int]], t: float, pay: Payoff) -> float:
    """Mean payoff by walking each clue's prefixes in order (the definition, written plainly)."""
    total = 0.0
    clues = sorted({r[0] for r in rows})
    for c in clues:
        for _, _, p, right in sorted((r for r in rows if r[0] == c), key=lambda r: r[1]):
            if p >= t:
                total += pay.reward if right else -pay.penalty
                break
    return total / len(clues)


def test_tune_threshold_by_hand() -> None:
    # grid 0.5: clue 7 +1 (at 0.6), clue 3 -1 (at 0.5)            -> 0
    #      0.85: clue 7 +1 (at 1.0, p 0.9), clue 3 -1 (at 0.5)     -> 0
    #      0.92: clue 7 never, clue 3 +1 (at 1.0, p 0.95)          -> 1/3
    #      0.97: nobody commits                                    -> 0
    grid = np.array([0.5, 0.85, 0.92, 0.97])
    best = tune_threshold(*_arrays(ROWS), payoff=Payoff(1, 1), grid=grid)
    assert best["threshold"] == 0.92
    assert best["mean_payoff"] == pytest.approx(1 / 3)
    for t in grid:
        got = simulate_commits(*_arrays(ROWS), float(t), Payoff(1, 1))["mean_payoff"]
        assert got == pytest.approx(_brute_force_payoff(ROWS, float(t), Payoff(1, 1)))


def test_tune_threshold_matches_brute_force_on_random_prefixes() -> None:
    rng = np.random.default_rng(4)
    rows = []
    for c, k in itertools.product(range(40), range(4)):
        rows.append((c, (k + 1) / 4, float(rng.random()), int(rng.random() < 0.6)))
    pay = Payoff(1, 2)
    grid = np.linspace(0.05, 0.99, 95)
    best = tune_threshold(*_arrays(rows), payoff=pay, grid=grid)
    brute = [_brute_force_payoff(rows, float(t), pay) for t in grid]
    assert best["mean_payoff"] == pytest.approx(max(brute))
    assert best["threshold"] == pytest.approx(grid[int(np.argmax(brute))])


# -- valuing an early answer --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"reward_fall": 1.5}, "reward_fall must be between 0 and 1"),
        ({"reward_fall": -0.1}, "reward_fall must be between 0 and 1"),
        ({"reward_fall": float("nan")}, "reward_fall must be between 0 and 1"),
        ({"cost_per_word": -1.0}, "cost_per_word must be a number >= 0"),
        ({"cost_per_word": float("inf")}, "cost_per_word must be a number >= 0"),
    ],
)
def test_speed_payoff_validation(kwargs: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        Payoff(1, 1, **kwargs)


def test_right_value_falls_with_the_share_and_the_words() -> None:
    # reward 2, falling by half across the clue: 2 * (1 - 0.5 * s) = 2, 1.5, 1 at s = 0, 0.5, 1.
    pay = Payoff(2, 1, reward_fall=0.5)
    assert pay.right_value([0.0, 0.5, 1.0]).tolist() == [2.0, 1.5, 1.0]
    # and 0.1 off per word read: at s = 0.5 after 4 words 1.5 - 0.4 = 1.1; never below 0.
    pay = Payoff(2, 1, reward_fall=0.5, cost_per_word=0.1)
    assert pay.right_value([0.5, 1.0], [4, 30]).tolist() == pytest.approx([1.1, 0.0])
    with pytest.raises(ValueError, match="needs the words read"):
        pay.right_value(0.5)
    assert not Payoff().values_speed and pay.values_speed


# Three clues, two prefixes each: (clue, share, words read, top probability, top right, none).
SPEED_ROWS = [
    (1, 0.5, 4, 0.70, 1, 0.20),
    (1, 1.0, 8, 0.90, 1, 0.05),
    (2, 0.5, 5, 0.60, 0, 0.30),
    (2, 1.0, 10, 0.80, 1, 0.15),
    (3, 0.5, 3, 0.20, 0, 0.50),
    (3, 1.0, 6, 0.40, 0, 0.60),
]


def _speed_prefixes() -> Prefixes:
    rows = list(SPEED_ROWS)
    np.random.default_rng(1).shuffle(rows)  # input order must not matter
    c, f, w, p, r, n = (np.array(v) for v in zip(*rows, strict=True))
    return Prefixes(c, f, p, r.astype(bool), words=w, none=n)


def test_replay_of_a_schedule_by_hand() -> None:
    rows = _speed_prefixes()
    # Reward 1 falling by half across the clue: a right answer earns 0.75 at half the clue,
    # 0.5 on the whole clue; a wrong one costs 1.
    pay = Payoff(1, 1, reward_fall=0.5)
    # Schedule: 0.65 up to half the clue, 0.75 after.
    #   clue 1: 0.70 >= 0.65 at 0.5, right             -> +0.75
    #   clue 2: 0.60 < 0.65; 0.80 >= 0.75 at 1.0, right -> +0.5
    #   clue 3: 0.20, 0.40: never                       -> 0
    # mean (0.75 + 0.5 + 0) / 3; answered 2/3, both right, at shares 0.5 and 1.0.
    sched = ThresholdSchedule((0.5, 1.0), (0.65, 0.75))
    res = rows.play(sched.per_row(rows.fraction), pay)
    assert res["mean_payoff"] == pytest.approx(1.25 / 3)
    assert res["commit_rate"] == pytest.approx(2 / 3)
    assert res["accuracy_when_committed"] == 1.0
    assert res["mean_fraction_at_commit"] == pytest.approx(0.75)
    # One threshold 0.55 everywhere: clue 1 +0.75 at 0.5, clue 2 answers at 0.5, wrong: -1.
    assert rows.play(0.55, pay)["mean_payoff"] == pytest.approx(-0.25 / 3)
    # Waiting for the whole clue at 0.75: clue 1 +0.5, clue 2 +0.5, clue 3 0.
    assert rows.play(0.75, pay, whole_clue_only=True)["mean_payoff"] == pytest.approx(1 / 3)
    # 0.05 off per word as well: clue 1 earns 0.75 - 4 * 0.05 = 0.55, clue 2 0.5 - 10 * 0.05 = 0.
    costly = Payoff(1, 1, reward_fall=0.5, cost_per_word=0.05)
    assert rows.play(sched.per_row(rows.fraction), costly)["mean_payoff"] == pytest.approx(0.55 / 3)
    # Abstaining on the whole clue when none of these >= 0.1: clue 2 (none 0.15) is dropped.
    res = rows.play(0.75, pay, whole_clue_only=True, none_abstain=0.1)
    assert res["mean_payoff"] == pytest.approx(0.5 / 3)


def test_schedule_bins_and_validation() -> None:
    s = ThresholdSchedule((0.2, 0.4, 1.0), (0.9, 0.8, 0.6))
    # (0, 0.2] -> bin 0, (0.2, 0.4] -> bin 1, (0.4, 1] -> bin 2; float noise at an edge stays
    assert s.bin_of([0.05, 0.2, 0.2 + 1e-12, 0.21, 0.4, 0.7, 1.0]).tolist() == [0, 0, 0, 1, 1, 2, 2]
    assert s.span(0.3) == (0.8, 0.2, 0.4)
    assert ThresholdSchedule.from_dict(s.to_dict()) == s
    for shares, thresholds, message in [
        ((0.5, 0.9), (0.5, 0.5), "last schedule share must be 1"),
        ((0.5, 0.5, 1.0), (0.5, 0.5, 0.5), "must increase"),
        ((0.5, 1.0), (0.5,), "one threshold per share bin"),
        ((0.5, 1.0), (0.5, 1.2), "between 0 and 1"),
    ]:
        with pytest.raises(ValueError, match=message):
            ThresholdSchedule(shares, thresholds)


def test_choose_threshold_says_why() -> None:
    s = ThresholdSchedule((0.5, 1.0), (0.9, 0.6))
    assert choose_threshold(None, s, 0.7, 0.3)[:2] == (0.9, "share")
    assert "0%-50% of the clue revealed" in choose_threshold(None, s, 0.7, 0.3)[2]
    assert choose_threshold(None, s, 0.7, 0.8)[:2] == (0.6, "share")
    assert choose_threshold(None, s, 0.7, None)[:2] == (0.6, "whole_clue")
    assert choose_threshold(None, None, 0.7, 0.3)[:2] == (0.7, "single")
    assert choose_threshold(Payoff(1, 3), s, 0.7, 0.3)[:2] == (0.75, "payoff")
    assert choose_threshold(None, None, None, None)[:2] == (0.5, "default")
    d = decide("a1", 0.95, 0.6, complete=True, none_of_these=0.04, none_abstain=0.03)
    assert d.action == ABSTAIN and "none of these 0.040 >= 0.030" in d.reason
    assert decide("a1", 0.95, 0.6, none_of_these=0.04, none_abstain=0.03).action == ANSWER
