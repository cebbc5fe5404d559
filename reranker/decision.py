"""When to answer: the payoff, the threshold chosen for a request, and replays of clues.

A `Payoff` says what a right answer earns and a wrong one costs; it may value speed, so a
right answer earns less the more of the clue it waited for. A `ThresholdSchedule`
(`reranker.schedule`) holds one threshold per bin of the share revealed. `Prefixes` replays
held-out clues word by word under a rule (the simulation every tuning and report figure
comes from); it is written by hand because the rule (first prefix that clears its own
threshold, per clue) has no library form, and vectorised so tuning can replay thousands of
rules in a second.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .schedule import ThresholdSchedule

ANSWER, WAIT, ABSTAIN = "answer", "wait", "abstain"


@dataclass(frozen=True)
class Payoff:
    """Reward for a right answer, penalty for a wrong one, abstaining 0; optionally speed.

    reward_fall: share of the reward lost by waiting for the whole clue (a right answer after
    share s of the clue earns reward * (1 - reward_fall * s)); cost_per_word: taken off a right
    answer's reward per word read. A right answer never earns less than 0.
    """

    reward: float = 1.0
    penalty: float = 1.0
    reward_fall: float = 0.0
    cost_per_word: float = 0.0

    def __post_init__(self) -> None:
        if not (self.reward > 0 and self.penalty >= 0) or not (
            math.isfinite(self.reward) and math.isfinite(self.penalty)
        ):
            raise ValueError(
                f"payoff needs reward > 0 and penalty >= 0, got {self.reward}, {self.penalty}"
            )
        if not 0.0 <= self.reward_fall <= 1.0:
            raise ValueError(f"reward_fall must be between 0 and 1, got {self.reward_fall}")
        if not (self.cost_per_word >= 0 and math.isfinite(self.cost_per_word)):
            raise ValueError(f"cost_per_word must be a number >= 0, got {self.cost_per_word}")

    @property
    def break_even(self) -> float:
        """The probability at which answering and abstaining have the same expected payoff.

        For a right answer worth the full reward (at the start of the clue).
        """
        return self.penalty / (self.reward + self.penalty)

    @property
    def values_speed(self) -> bool:
        """Whether an early right answer is worth more than a late one."""
        return self.reward_fall > 0 or self.cost_per_word > 0

    def right_value(self, share: Any, words: Any = None) -> np.ndarray:
        """What a right answer earns after `share` of the clue and `words` words (float64)."""
        value = self.reward * (1.0 - self.reward_fall * np.asarray(share, dtype=np.float64))
        if self.cost_per_word:
            if words is None:
                raise ValueError("a payoff with a cost per word needs the words read")
            value = value - self.cost_per_word * np.asarray(words, dtype=np.float64)
        return np.maximum(value, 0.0)

    def to_dict(self) -> dict[str, float]:
        """Plain data for the model file and reports."""
        return {
            "reward": self.reward,
            "penalty": self.penalty,
            "reward_fall": self.reward_fall,
            "cost_per_word": self.cost_per_word,
        }


@dataclass(frozen=True)
class Decision:
    """What to do now: answer with doc_id, wait for more words, or abstain (clue complete)."""

    action: str
    doc_id: str | None
    probability: float | None
    threshold: float
    reason: str
    basis: str = "single"  # why this threshold: payoff, share, whole_clue, single or default


BASIS_TEXT = {
    "payoff": "the break-even point of the request's payoff",
    "whole_clue": "the schedule's whole-clue threshold (no share revealed given)",
    "single": "the model's single threshold",
    "default": "no model: the default 0.5",
}


def choose_threshold(
    payoff: Payoff | None,
    schedule: ThresholdSchedule | None,
    single: float | None,
    revealed: float | None,
) -> tuple[float, str, str]:
    """(threshold, basis, why in words) for a request.

    A request's payoff wins; then the model's schedule at the share revealed (the whole-clue
    bin when no share is given); then the model's single threshold; 0.5 without a model.
    """
    if payoff is not None:
        return payoff.break_even, "payoff", BASIS_TEXT["payoff"]
    if schedule is not None:
        if revealed is None:
            return schedule.thresholds[-1], "whole_clue", BASIS_TEXT["whole_clue"]
        t, lo, hi = schedule.span(revealed)
        return (
            t,
            "share",
            (
                f"the schedule's threshold for {lo:.0%}-{hi:.0%} of the clue revealed "
                f"(revealed {revealed:.2f})"
            ),
        )
    if single is not None:
        return single, "single", BASIS_TEXT["single"]
    return 0.5, "default", BASIS_TEXT["default"]


def _apart(value: float, other: float) -> str:
    """`value` to 3 decimals, or more when that is needed to tell it from `other`."""
    for places in range(3, 10):
        if f"{value:.{places}f}" != f"{other:.{places}f}":
            return f"{value:.{places}f}"
    return f"{value:.3f}"


def decide(
    top_id: str | None,
    top_probability: float | None,
    threshold: float,
    *,
    complete: bool = False,
    basis: str = "single",
    why: str = "",
    none_of_these: float | None = None,
    none_abstain: float | None = None,
) -> Decision:
    """Answer when the top probability clears the threshold, else wait (abstain if complete).

    On a complete clue whose "none of these" share is at least none_abstain, abstain.
    """
    idle = ABSTAIN if complete else WAIT
    tail = f"; threshold: {why}" if why else ""

    def made(action: str, doc: str | None, p: float | None, reason: str) -> Decision:
        return Decision(action, doc, p, threshold, reason + tail, basis)

    if top_id is None:
        return made(idle, None, None, "no candidates: none of the clue's words is in the index")
    if top_probability is None:
        return made(idle, None, None, "no model loaded: candidates are ranked by BM25 only")
    if (
        complete
        and none_abstain is not None
        and none_of_these is not None
        and none_of_these >= none_abstain
    ):
        return made(
            ABSTAIN,
            None,
            top_probability,
            f"none of these {none_of_these:.3f} >= {none_abstain:.3f} on the complete clue",
        )
    if top_probability >= threshold:
        return made(
            ANSWER,
            top_id,
            top_probability,
            f"top probability {_apart(top_probability, threshold)} >= threshold "
            f"{_apart(threshold, top_probability)}",
        )
    return made(
        idle,
        None,
        top_probability,
        f"top probability {_apart(top_probability, threshold)} < threshold "
        f"{_apart(threshold, top_probability)}",
    )


class Prefixes:
    """Held-out clue prefixes, clue by clue in reading order, ready to replay under rules.

    One row per prefix: clue id, share revealed, words read, the top candidate's probability,
    whether it is right, and (optional) the "none of these" share.
    """

    def __init__(
        self,
        clue: Any,
        fraction: Any,
        top_prob: Any,
        top_right: Any,
        *,
        words: Any = None,
        none: Any = None,
    ) -> None:
        clue = np.asarray(clue)
        if clue.size == 0:
            raise ValueError("a replay needs at least one clue prefix")
        fraction = np.asarray(fraction, dtype=np.float64)
        order = np.lexsort((fraction, clue))
        c = clue[order]
        self.fraction = fraction[order]
        self.prob = np.asarray(top_prob, dtype=np.float64)[order]
        self.right = np.asarray(top_right).astype(bool)[order]
        self.words = None if words is None else np.asarray(words, dtype=np.float64)[order]
        self.none = None if none is None else np.asarray(none, dtype=np.float64)[order]
        self.starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
        self.last = np.r_[self.starts[1:], c.size] - 1
        self.is_last = np.zeros(c.size, dtype=bool)
        self.is_last[self.last] = True
        self.clue_of = np.repeat(np.arange(self.starts.size), np.diff(np.r_[self.starts, c.size]))
        self.n_clues = int(self.starts.size)

    def play(
        self,
        thresholds: Any,
        payoff: Payoff,
        *,
        none_abstain: float | None = None,
        whole_clue_only: bool = False,
    ) -> dict[str, float]:
        """Answer at each clue's first prefix whose top probability clears its threshold.

        thresholds: one number, or one per row (in this object's order). A right answer earns
        payoff.right_value(share, words), a wrong one -penalty, a clue never answered 0.
        whole_clue_only: decide on the last prefix alone ("always wait"). none_abstain: on the
        last prefix, do not answer when "none of these" is at least this.
        """
        fire = self.prob >= np.asarray(thresholds, dtype=np.float64)
        if whole_clue_only:
            fire &= self.is_last
        if none_abstain is not None and self.none is not None:
            fire &= ~(self.is_last & (self.none >= none_abstain))
        # first firing row of each clue: the smallest firing position within the clue
        pos = np.where(fire, np.arange(fire.size), fire.size)
        first = np.minimum.reduceat(pos, self.starts)
        committed = first < fire.size
        at = first[committed]
        right = self.right[at]
        value = payoff.right_value(
            self.fraction[at], None if self.words is None else self.words[at]
        )
        gains = np.where(right, value, -payoff.penalty)
        n_done = int(committed.sum())
        return {
            "mean_payoff": float(gains.sum() / self.n_clues),
            "commit_rate": n_done / self.n_clues,
            "accuracy_when_committed": float(right.mean()) if n_done else 0.0,
            "mean_fraction_at_commit": float(self.fraction[at].mean()) if n_done else 1.0,
            "n_clues": self.n_clues,
        }


def simulate_commits(
    clue: np.ndarray,
    fraction: np.ndarray,
    top_prob: np.ndarray,
    top_right: np.ndarray,
    threshold: float,
    payoff: Payoff,
    *,
    words: np.ndarray | None = None,
) -> dict[str, float]:
    """Play each clue word by word, committing at the first prefix that clears the threshold.

    Inputs are per clue prefix (one row each). Returns mean payoff, commit rate, accuracy of the
    commits and mean fraction of the clue revealed at commit, plus the same for deciding only on
    the full clue ("always wait"). `words` (words read per prefix) is needed for a cost per word.
    """
    rows = Prefixes(clue, fraction, top_prob, top_right, words=words)
    early = rows.play(threshold, payoff)
    full = rows.play(threshold, payoff, whole_clue_only=True)
    return {
        "threshold": float(threshold),
        **early,
        "full_clue_mean_payoff": full["mean_payoff"],
        "full_clue_commit_rate": full["commit_rate"],
    }


def tune_threshold(
    clue: np.ndarray,
    fraction: np.ndarray,
    top_prob: np.ndarray,
    top_right: np.ndarray,
    payoff: Payoff,
    grid: np.ndarray | None = None,
    *,
    words: np.ndarray | None = None,
) -> dict[str, float]:
    """The threshold that maximizes mean payoff when committing early, on held-out prefixes."""
    grid = np.linspace(0.05, 0.99, 95) if grid is None else grid
    rows = Prefixes(clue, fraction, top_prob, top_right, words=words)
    best: tuple[float, dict[str, float]] | None = None
    for t in grid:
        res = rows.play(float(t), payoff)
        if best is None or res["mean_payoff"] > best[1]["mean_payoff"] + 1e-12:
            best = (float(t), res)
    if best is None:
        raise ValueError("empty threshold grid")
    full = rows.play(best[0], payoff, whole_clue_only=True)
    return {
        "threshold": best[0],
        **best[1],
        "full_clue_mean_payoff": full["mean_payoff"],
        "full_clue_commit_rate": full["commit_rate"],
    }
