"""Evaluation metrics of the reranker as pure functions over arrays (candidate and clue level)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

DEFAULT_KS = (1, 5, 10, 20)
# The standard normal quantile at 0.975 (scipy.special.ndtri(0.975)): a 95% two-sided interval.
Z_95 = 1.959963984540054


def _labels_and_probs(y_true: Any, prob: Any) -> tuple[np.ndarray, np.ndarray]:
    """Validate a 0/1 label array and a probability array of the same length."""
    y = np.asarray(y_true)
    p = np.asarray(prob, dtype=float)
    if y.ndim != 1 or p.ndim != 1:
        raise ValueError(f"y_true and prob must be 1-D, got shapes {y.shape} and {p.shape}")
    if len(y) != len(p):
        raise ValueError(f"y_true has {len(y)} rows but prob has {len(p)}")
    if len(y) == 0:
        raise ValueError("y_true and prob are empty")
    if not np.isin(y, (0, 1)).all():
        raise ValueError("y_true must hold only 0 and 1 (or False and True)")
    if not np.isfinite(p).all() or p.min() < 0.0 or p.max() > 1.0:
        raise ValueError("prob must hold finite values between 0 and 1")
    return y.astype(np.int64), p


def _bin_index(p: np.ndarray, n_bins: int) -> np.ndarray:
    """Equal-width bin of each probability: bin i holds i/n <= p < (i+1)/n, 1.0 goes to the last.

    floor(p * n) rather than searching float edges, so a decimal edge such as 0.3 lands in the
    bin that starts at 0.3 (as a reader expects) even though linspace's 0.3 edge rounds upward.
    """
    if not isinstance(n_bins, int | np.integer) or n_bins < 1:
        raise ValueError(f"n_bins must be a positive integer, got {n_bins!r}")
    return np.minimum(np.floor(p * n_bins).astype(np.int64), n_bins - 1)


def expected_calibration_error(y_true: Any, prob: Any, n_bins: int = 10) -> float:
    """Expected calibration error over equal-width bins (Guo et al. 2017)."""
    y, p = _labels_and_probs(y_true, prob)
    idx = _bin_index(p, n_bins)
    # (|B|/n) * |sum_y/|B| - sum_p/|B|| simplifies to |sum_y - sum_p| / n; empty bins add 0.
    sum_y = np.bincount(idx, weights=y, minlength=n_bins)
    sum_p = np.bincount(idx, weights=p, minlength=n_bins)
    return float(np.abs(sum_y - sum_p).sum() / len(y))


def wilson_interval(successes: int, n: int, z: float = Z_95) -> tuple[float, float]:
    """Wilson (1927) score interval for a binomial proportion: (low, high), (0, 1) when n is 0.

    E. B. Wilson, "Probable inference, the law of succession, and statistical inference",
    JASA 22 (1927) 209-212: with p = successes / n,

        centre = (p + z^2 / 2n) / (1 + z^2 / n)
        half   = z / (1 + z^2 / n) * sqrt(p (1 - p) / n + z^2 / 4n^2)

    Written out here (a few lines) rather than importing statsmodels, which serving-side
    installs do not carry; the tests compare it with statsmodels' proportion_confint.
    Unlike the normal (Wald) interval it stays inside [0, 1] and is not empty at p = 0 or 1.
    """
    if n < 0 or not 0 <= successes <= n:
        raise ValueError(f"need 0 <= successes <= n, got {successes} of {n}")
    if n == 0:
        return 0.0, 1.0
    p = successes / n
    z2 = z * z
    denom = 1.0 + z2 / n
    centre = (p + z2 / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return float(max(0.0, centre - half)), float(min(1.0, centre + half))


def reliability_table(y_true: Any, prob: Any, n_bins: int = 10) -> list[dict[str, Any]]:
    """Per equal-width bin: lo, hi, count, mean_prob, frac_positive and its 95% Wilson interval.

    ci_low and ci_high bound the share of right answers in the bin (Wilson 1927, see
    `wilson_interval`); mean_prob, frac_positive and the interval are None when the bin is empty.
    """
    y, p = _labels_and_probs(y_true, prob)
    idx = _bin_index(p, n_bins)
    count = np.bincount(idx, minlength=n_bins)
    sum_y = np.bincount(idx, weights=y, minlength=n_bins)
    sum_p = np.bincount(idx, weights=p, minlength=n_bins)
    rows = []
    for i in range(n_bins):
        c = int(count[i])
        low, high = wilson_interval(round(float(sum_y[i])), c) if c else (None, None)
        rows.append(
            {
                "lo": i / n_bins,
                "hi": (i + 1) / n_bins,
                "count": c,
                "mean_prob": float(sum_p[i] / c) if c else None,
                "frac_positive": float(sum_y[i] / c) if c else None,
                "ci_low": low,
                "ci_high": high,
            }
        )
    return rows


def candidate_metrics(y_true: Any, prob: Any) -> dict[str, Any]:
    """Per-candidate accuracy (p >= 0.5 means 'right'), ROC-AUC, log-loss, Brier, ECE, n, rate."""
    # Imported here, not at the top: serving imports this module (through train.py) but
    # computes no metrics, and scikit-learn costs about 140 MB per worker.
    from sklearn.metrics import accuracy_score, brier_score_loss, log_loss, roc_auc_score

    y, p = _labels_and_probs(y_true, prob)
    two_classes = 0 < y.sum() < len(y)
    return {
        "accuracy": float(accuracy_score(y, p >= 0.5)),
        "roc_auc": float(roc_auc_score(y, p)) if two_classes else None,
        "log_loss": float(log_loss(y, p, labels=[0, 1])),
        "brier": float(brier_score_loss(y, p, labels=[0, 1])),
        "ece": expected_calibration_error(y, p),
        "n": len(y),
        "positive_rate": float(y.mean()),
    }


def baseline_all_wrong(y_true: Any) -> dict[str, Any]:
    """Scores of the trivial model that calls every candidate wrong.

    Accuracy is that of predicting 0 for every candidate (= 1 - positive rate). A hard 0 would
    give infinite log-loss, so log-loss, Brier, ROC-AUC and ECE are those of the constant
    forecast 'probability = positive rate' on every candidate: log-loss is then the label
    entropy, Brier is rate * (1 - rate), ROC-AUC is 0.5 (None with one class) and ECE is 0.
    A model has to beat these numbers to have learned anything beyond the base rate.
    """
    y = np.asarray(y_true)
    rate = float(np.mean(y)) if y.ndim == 1 and len(y) else 0.0
    out = candidate_metrics(y, np.full(y.shape, rate))
    out["accuracy"] = float(np.mean(y == 0))
    return out


def _groups(groups: Any, n: int) -> np.ndarray:
    """Validate an integer group-id array with one entry per candidate row."""
    g = np.asarray(groups)
    if g.ndim != 1 or len(g) != n:
        raise ValueError(f"groups must be 1-D with {n} rows, got shape {g.shape}")
    if not np.issubdtype(g.dtype, np.integer):
        raise ValueError(f"groups must hold integer clue ids, got dtype {g.dtype}")
    return g


def _scores(values: Any, n: int, name: str) -> np.ndarray:
    """Validate a finite float array with one entry per candidate row."""
    s = np.asarray(values, dtype=float)
    if s.ndim != 1 or len(s) != n:
        raise ValueError(f"{name} must be 1-D with {n} rows, got shape {s.shape}")
    if not np.isfinite(s).all():
        raise ValueError(f"{name} must hold finite numbers")
    return s


def _ranked(groups: np.ndarray, *keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort rows by (group, -keys[0], -keys[1], ...); return order, group starts, rank in group.

    np.lexsort is stable, so rows tied on every key keep their input order.
    """
    order = np.lexsort([-k for k in reversed(keys)] + [groups])
    g = groups[order]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    sizes = np.diff(np.r_[starts, len(g)])
    rank = np.arange(len(g)) - np.repeat(starts, sizes) + 1
    return order, starts, rank


def _answer_rank(
    y: np.ndarray, order: np.ndarray, starts: np.ndarray, rank: np.ndarray
) -> np.ndarray:
    """Rank of the first right candidate of each group in this order; inf when none is right."""
    hit_rank = np.where(y[order] == 1, rank, np.inf)
    return np.minimum.reduceat(hit_rank, starts)


def clue_metrics(
    groups: Any, y_true: Any, prob: Any, bm25_score: Any, ks: tuple[int, ...] = DEFAULT_KS
) -> dict[str, Any]:
    """Clue-level top-1, recall@k, MRR and calibration of the top candidate's probability.

    BM25 order breaks ties by input row order; the reranked order breaks probability ties by
    BM25 score. A clue with several rows labelled 1 counts as found at its best-ranked one
    (success@k), which equals recall@k when each clue has one answer.
    """
    from sklearn.metrics import brier_score_loss

    y, p = _labels_and_probs(y_true, prob)
    g = _groups(groups, len(y))
    bm25 = _scores(bm25_score, len(y), "bm25_score")
    if any(int(k) < 1 for k in ks):
        raise ValueError(f"every k must be >= 1, got {ks}")

    order_b, starts, rank_b = _ranked(g, bm25)
    answer_b = _answer_rank(y, order_b, starts, rank_b)
    order_r, starts_r, rank_r = _ranked(g, p, bm25)
    answer_r = _answer_rank(y, order_r, starts_r, rank_r)

    top_rows = order_r[starts_r]
    top_p, top_y = p[top_rows], y[top_rows]
    return {
        "n_clues": len(starts),
        "answer_in_candidates": float(np.isfinite(answer_b).mean()),
        "top1_bm25": float((answer_b == 1).mean()),
        "top1_reranked": float((answer_r == 1).mean()),
        "recall_at_k": {int(k): float((answer_b <= k).mean()) for k in ks},
        "mrr_bm25": float((1.0 / answer_b).mean()),
        "mrr_reranked": float((1.0 / answer_r).mean()),
        "top_candidate_ece": expected_calibration_error(top_y, top_p),
        "top_candidate_reliability": reliability_table(top_y, top_p),
        "top_candidate_brier": float(brier_score_loss(top_y, top_p, labels=[0, 1])),
        "mean_top_probability": float(top_p.mean()),
        "clue_log_loss": clue_log_loss(g, y, p),
    }


def clue_log_loss(groups: Any, y_true: Any, prob: Any, eps: float = 1e-15) -> float:
    """Mean over clues of -log P(right candidate), or -log P(none of these) without one.

    prob is one distribution per clue: its candidates' shares, whose remainder to 1 is the
    "none of these" share. A pointwise model's probabilities can sum past 1 within a clue;
    their remainder is then clipped at eps, the same clip as scikit-learn's log_loss uses
    for a probability of 0. Rows must be grouped by clue id (any order within a clue).
    """
    y, p = _labels_and_probs(y_true, prob)
    g = _groups(groups, len(y))
    if len(y) == 0:
        return float("nan")
    order = np.argsort(g, kind="stable")
    g, y, p = g[order], y[order], p[order]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    right = np.add.reduceat(np.where(y == 1, p, 0.0), starts)
    found = np.maximum.reduceat(y, starts) == 1
    none = 1.0 - np.add.reduceat(p, starts)
    chosen = np.where(found, right, none)
    return float(-np.log(np.clip(chosen, eps, 1.0)).mean())


def _payoff_terms(payoff: Any) -> tuple[float, float]:
    """Reward and penalty from a mapping or an object with those attributes."""
    if isinstance(payoff, Mapping):
        reward, penalty = payoff.get("reward"), payoff.get("penalty")
    else:
        reward, penalty = getattr(payoff, "reward", None), getattr(payoff, "penalty", None)
    if reward is None or penalty is None:
        raise ValueError("payoff needs a 'reward' and a 'penalty'")
    return float(reward), float(penalty)


def by_prefix(
    fractions: Any, groups: Any, y_true: Any, prob: Any, committed: Any, payoff: Any
) -> list[dict[str, Any]]:
    """Per share of the clue revealed: top-1 accuracy, commit rate, accuracy when committed, payoff.

    A group answers when one of its rows is committed: +reward if that row is right (less its
    `reward_fall` share times the share seen, when the payoff has one), -penalty if wrong; a
    group that waits scores 0. Fractions are grouped by exact value.
    """
    y, p = _labels_and_probs(y_true, prob)
    n = len(y)
    g = _groups(groups, n)
    frac = _scores(fractions, n, "fractions")
    com = np.asarray(committed)
    if com.ndim != 1 or len(com) != n or not np.isin(com, (0, 1)).all():
        raise ValueError(f"committed must be a 1-D boolean array with {n} rows")
    com = com.astype(bool)
    reward, penalty = _payoff_terms(payoff)

    order, starts, _ = _ranked(g, p)
    f_sorted = frac[order]
    group_frac = f_sorted[starts]
    if (np.maximum.reduceat(f_sorted, starts) != np.minimum.reduceat(f_sorted, starts)).any():
        raise ValueError("fractions must be the same for every row of a group")
    n_committed = np.add.reduceat(com[order].astype(np.int64), starts)
    if (n_committed > 1).any():
        bad = g[order][starts][n_committed > 1][0]
        raise ValueError(f"group {bad} has more than one committed candidate")
    answered = n_committed == 1
    right = np.add.reduceat((com & (y == 1))[order].astype(np.int64), starts) == 1
    top_right = y[order[starts]] == 1
    # A payoff that values speed pays a right answer less the more of the clue was seen (the
    # cost per word needs each clue's word count, which this table does not have).
    fall = (
        payoff.get("reward_fall", 0.0)
        if isinstance(payoff, Mapping)
        else getattr(payoff, "reward_fall", 0.0)
    )
    reward_now = reward * (1.0 - float(fall) * group_frac)
    gain = np.where(answered, np.where(right, reward_now, -penalty), 0.0)

    rows = []
    for f in np.unique(group_frac):
        sel = group_frac == f
        n_answered = int(answered[sel].sum())
        rows.append(
            {
                "fraction": float(f),
                "n_clues": int(sel.sum()),
                "top1_accuracy": float(top_right[sel].mean()),
                "commit_rate": float(answered[sel].mean()),
                "accuracy_when_committed": (
                    float(right[sel].sum() / n_answered) if n_answered else None
                ),
                "mean_payoff": float(gain[sel].mean()),
            }
        )
    return rows
