"""When to answer: the break-even threshold of a payoff, tuning it, and simulating commits."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

ANSWER, WAIT, ABSTAIN = "answer", "wait", "abstain"


@dataclass(frozen=True)
class Payoff:
    """Reward for a right answer and penalty for a wrong one; abstaining scores 0."""

    reward: float = 1.0
    penalty: float = 1.0

    def __post_init__(self) -> None:
        if not (self.reward > 0 and self.penalty >= 0):
            raise ValueError(
                f"payoff needs reward > 0 and penalty >= 0, got {self.reward}, {self.penalty}"
            )

    @property
    def break_even(self) -> float:
        """The probability at which answering and abstaining have the same expected payoff."""
        return self.penalty / (self.reward + self.penalty)


@dataclass(frozen=True)
class Decision:
    """What to do now: answer with doc_id, wait for more words, or abstain (clue complete)."""

    action: str
    doc_id: str | None
    probability: float | None
    threshold: float
    reason: str


def decide(
    top_id: str | None, top_probability: float | None, threshold: float, *, complete: bool = False
) -> Decision:
    """Answer when the top probability clears the threshold, else wait (abstain if complete)."""
    idle = ABSTAIN if complete else WAIT
    if top_id is None:
        return Decision(
            idle, None, None, threshold, "no candidates: none of the clue's words is in the index"
        )
    if top_probability is None:
        return Decision(
            idle, None, None, threshold, "no model loaded: candidates are ranked by BM25 only"
        )
    if top_probability >= threshold:
        return Decision(
            ANSWER,
            top_id,
            top_probability,
            threshold,
            f"top probability {top_probability:.3f} >= threshold {threshold:.3f}",
        )
    return Decision(
        idle,
        None,
        top_probability,
        threshold,
        f"top probability {top_probability:.3f} < threshold {threshold:.3f}",
    )


def simulate_commits(
    clue: np.ndarray,
    fraction: np.ndarray,
    top_prob: np.ndarray,
    top_right: np.ndarray,
    threshold: float,
    payoff: Payoff,
) -> dict[str, float]:
    """Play each clue word by word, committing at the first prefix that clears the threshold.

    Inputs are per clue prefix (one row each). Returns mean payoff, commit rate, accuracy of the
    commits and mean fraction of the clue revealed at commit, plus the same for deciding only on
    the full clue ("always wait").
    """
    if np.asarray(clue).size == 0:
        raise ValueError("simulate_commits needs at least one clue prefix")
    order = np.lexsort((fraction, clue))
    c, f, p, r = clue[order], fraction[order], top_prob[order], top_right[order].astype(bool)
    starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    ends = np.r_[starts[1:], c.size]
    fire = p >= threshold
    # first firing prefix of each clue, or -1
    first = np.full(starts.size, -1)
    fire_pos = np.flatnonzero(fire)
    if fire_pos.size:
        clue_of = np.searchsorted(starts, fire_pos, side="right") - 1
        seen = np.r_[True, clue_of[1:] != clue_of[:-1]]
        first[clue_of[seen]] = fire_pos[seen]
    committed = first >= 0
    right = np.where(committed, r[np.maximum(first, 0)], False)
    gains = np.where(committed, np.where(right, payoff.reward, -payoff.penalty), 0.0)
    last = ends - 1
    full_fire = p[last] >= threshold
    full_gain = np.where(full_fire, np.where(r[last], payoff.reward, -payoff.penalty), 0.0)
    n = max(starts.size, 1)
    return {
        "threshold": float(threshold),
        "mean_payoff": float(gains.sum() / n),
        "commit_rate": float(committed.mean()) if starts.size else 0.0,
        "accuracy_when_committed": float(right[committed].mean()) if committed.any() else 0.0,
        "mean_fraction_at_commit": float(f[first[committed]].mean()) if committed.any() else 1.0,
        "full_clue_mean_payoff": float(full_gain.sum() / n),
        "full_clue_commit_rate": float(full_fire.mean()) if starts.size else 0.0,
        "n_clues": int(starts.size),
    }


def tune_threshold(
    clue: np.ndarray,
    fraction: np.ndarray,
    top_prob: np.ndarray,
    top_right: np.ndarray,
    payoff: Payoff,
    grid: np.ndarray | None = None,
) -> dict[str, float]:
    """The threshold that maximizes mean payoff when committing early, on held-out prefixes."""
    grid = np.linspace(0.05, 0.99, 95) if grid is None else grid
    best: dict[str, float] | None = None
    for t in grid:
        res = simulate_commits(clue, fraction, top_prob, top_right, float(t), payoff)
        if best is None or res["mean_payoff"] > best["mean_payoff"] + 1e-12:
            best = res
    if best is None:
        raise ValueError("empty threshold grid")
    return best
