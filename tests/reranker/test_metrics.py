"""Tests of reranker.training.measures against published formulas, scikit-learn and pytrec_eval."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest
import pytrec_eval
from sklearn.calibration import calibration_curve
from sklearn.metrics import accuracy_score, brier_score_loss, log_loss, roc_auc_score
from statsmodels.stats.proportion import proportion_confint

from reranker.training.measures import (
    baseline_all_wrong,
    by_prefix,
    candidate_metrics,
    clue_metrics,
    expected_calibration_error,
    reliability_table,
    wilson_interval,
)

# --- ECE, Guo et al. (2017) "On Calibration of Modern Neural Networks", eq. (3) -------------

P_EX = np.array([0.1, 0.2, 0.25, 0.6, 0.65, 0.9, 0.95, 1.0])
Y_EX = np.array([0, 0, 1, 1, 0, 1, 1, 1])


def test_ece_hand_worked_example() -> None:
    # Guo et al. (2017): ECE = sum_b |B_b|/n * |acc(B_b) - conf(B_b)|, 10 equal-width bins, n = 8.
    # bin [0.1,0.2): {0.1}             acc 0/1 = 0,   conf 0.1   -> 1/8 * 0.1   = 0.0125
    # bin [0.2,0.3): {0.2, 0.25}       acc 1/2 = 0.5, conf 0.225 -> 2/8 * 0.275 = 0.06875
    # bin [0.6,0.7): {0.6, 0.65}       acc 1/2 = 0.5, conf 0.625 -> 2/8 * 0.125 = 0.03125
    # bin [0.9,1.0]: {0.9, 0.95, 1.0}  acc 3/3 = 1,   conf 0.95  -> 3/8 * 0.05  = 0.01875
    # total = 0.0125 + 0.06875 + 0.03125 + 0.01875 = 0.13125
    assert expected_calibration_error(Y_EX, P_EX) == pytest.approx(0.13125, abs=1e-12)


def test_reliability_table_of_the_worked_example() -> None:
    # Same arithmetic as above (Guo et al. 2017 bins); 1.0 falls in the last, closed bin.
    table = reliability_table(Y_EX, P_EX)
    assert [r["count"] for r in table] == [0, 1, 2, 0, 0, 0, 2, 0, 0, 3]
    assert table[2]["mean_prob"] == pytest.approx(0.225)
    assert table[2]["frac_positive"] == pytest.approx(0.5)
    assert table[9]["mean_prob"] == pytest.approx(0.95)
    assert table[0]["mean_prob"] is None and table[0]["frac_positive"] is None
    assert table[0]["lo"] == 0.0 and table[9]["hi"] == 1.0


def test_bin_edges_left_closed_and_last_bin_closed() -> None:
    # Convention documented in metrics._bin_index: i/n <= p < (i+1)/n, 1.0 in the last bin.
    table = reliability_table([0, 0, 0, 0], [0.0, 0.5, 0.999, 1.0])
    assert [r["count"] for r in table] == [1, 0, 0, 0, 0, 1, 0, 0, 0, 2]


def test_reliability_table_matches_sklearn_calibration_curve() -> None:
    # scikit-learn calibration_curve(strategy="uniform") reports the same per-bin means.
    rng = np.random.default_rng(3)
    p = rng.random(5000)
    y = (rng.random(5000) < p**1.5).astype(int)
    table = [r for r in reliability_table(y, p) if r["count"]]
    prob_true, prob_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
    np.testing.assert_allclose([r["frac_positive"] for r in table], prob_true)
    np.testing.assert_allclose([r["mean_prob"] for r in table], prob_pred)
    # ECE as Guo et al. (2017) define it, rebuilt from sklearn's per-bin means and our counts.
    counts = np.array([r["count"] for r in table])
    expected = float((counts / len(y) * np.abs(prob_true - prob_pred)).sum())
    assert expected_calibration_error(y, p) == pytest.approx(expected, abs=1e-12)


def test_ece_near_zero_when_calibrated_and_grows_with_shift() -> None:
    # Guo et al. (2017): a perfectly calibrated model has ECE 0; sampling noise only here.
    rng = np.random.default_rng(0)
    p = rng.random(200_000)
    y = (rng.random(len(p)) < p).astype(int)
    calibrated = expected_calibration_error(y, p)
    assert calibrated < 0.01
    shifted = [expected_calibration_error(y, np.clip(p + s, 0, 1)) for s in (0.05, 0.1, 0.2)]
    assert calibrated < shifted[0] < shifted[1] < shifted[2]


def test_ece_rejects_bad_input() -> None:
    with pytest.raises(ValueError, match="rows"):
        expected_calibration_error([0, 1], [0.5])
    with pytest.raises(ValueError, match="between 0 and 1"):
        expected_calibration_error([0, 1], [0.5, 1.5])
    with pytest.raises(ValueError, match="0 and 1"):
        expected_calibration_error([0, 2], [0.5, 0.5])
    with pytest.raises(ValueError, match="n_bins"):
        expected_calibration_error([0, 1], [0.5, 0.5], n_bins=0)
    with pytest.raises(ValueError, match="empty"):
        expected_calibration_error([], [])


# --- Brier (1950), "Verification of forecasts expressed in terms of probability" ---------------


def test_brier_worked_example() -> None:
    # Brier (1950) for one event: mean squared difference between forecast and outcome.
    # f = 0.9, 0.3, 0.6, 0.1; o = 1, 0, 0, 0
    # (0.1^2 + 0.3^2 + 0.6^2 + 0.1^2) / 4 = (0.01 + 0.09 + 0.36 + 0.01) / 4 = 0.1175
    f = np.array([0.9, 0.3, 0.6, 0.1])
    o = np.array([1, 0, 0, 0])
    got = candidate_metrics(o, f)["brier"]
    assert got == pytest.approx(0.1175, abs=1e-12)
    # Brier's original score sums over both classes (event and non-event):
    # (0.01+0.01) + (0.09+0.09) + (0.36+0.36) + (0.01+0.01) = 0.94, / 4 = 0.235 = 2 * 0.1175.
    assert 2 * got == pytest.approx(0.235, abs=1e-12)
    # scikit-learn brier_score_loss uses the one-class form.
    assert got == pytest.approx(brier_score_loss(o, f), abs=1e-15)


@pytest.mark.parametrize("seed", range(5))
def test_candidate_metrics_equal_sklearn(seed: int) -> None:
    # scikit-learn metrics: roc_auc_score, log_loss, brier_score_loss, accuracy_score.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(50, 2000))
    p = rng.random(n)
    y = (rng.random(n) < 0.3 + 0.4 * p).astype(int)
    m = candidate_metrics(y, p)
    assert m["roc_auc"] == pytest.approx(roc_auc_score(y, p), abs=1e-12)
    assert m["log_loss"] == pytest.approx(log_loss(y, p), abs=1e-12)
    assert m["brier"] == pytest.approx(brier_score_loss(y, p), abs=1e-12)
    assert m["accuracy"] == pytest.approx(accuracy_score(y, p >= 0.5), abs=1e-12)
    assert m["ece"] == pytest.approx(expected_calibration_error(y, p))
    assert m["n"] == n and m["positive_rate"] == pytest.approx(y.mean())


def test_candidate_metrics_one_class_has_no_auc() -> None:
    # ROC-AUC is undefined with one class (scikit-learn roc_auc_score raises there).
    m = candidate_metrics([0, 0, 0], [0.1, 0.2, 0.3])
    assert m["roc_auc"] is None
    assert m["log_loss"] == pytest.approx(log_loss([0, 0, 0], [0.1, 0.2, 0.3], labels=[0, 1]))


def test_baseline_all_wrong() -> None:
    # Rate 0.2: accuracy of 'all wrong' 0.8; constant forecast 0.2 has Brier (1950)
    # 0.2 * 0.8^2 + 0.8 * 0.2^2 = 0.16, log-loss = -(0.2 ln 0.2 + 0.8 ln 0.8) = 0.50040,
    # ECE (Guo et al. 2017) = |0.2 - 0.2| = 0 with all forecasts in one bin.
    y = np.array([1, 0, 0, 0, 0] * 4)
    b = baseline_all_wrong(y)
    assert b["accuracy"] == pytest.approx(0.8)
    assert b["brier"] == pytest.approx(0.16)
    assert b["log_loss"] == pytest.approx(-(0.2 * math.log(0.2) + 0.8 * math.log(0.8)))
    assert b["log_loss"] == pytest.approx(log_loss(y, np.full(len(y), 0.2)))  # scikit-learn
    assert b["ece"] == pytest.approx(0.0, abs=1e-12)
    assert b["roc_auc"] == pytest.approx(0.5)  # scikit-learn roc_auc_score of a constant score


# --- clue level, against pytrec_eval (trec_eval's recip_rank, success_k, recall_k) -------------


def _random_clues(seed: int) -> tuple[np.ndarray, ...]:
    """Random clues of 1..25 candidates, shuffled rows, one or no answer each, distinct scores."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 26, size=80)
    groups = np.repeat(np.arange(80) * 7 + 3, sizes)
    y = np.zeros(len(groups), dtype=int)
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    has_answer = rng.random(80) < 0.8
    y[(starts + rng.integers(0, sizes))[has_answer]] = 1
    bm25 = rng.permutation(len(groups)) * 0.37 + 1.0
    prob = rng.permutation(len(groups)) / (len(groups) + 1.0)
    perm = rng.permutation(len(groups))
    return groups[perm], y[perm], prob[perm], bm25[perm]


def _trec(groups: np.ndarray, y: np.ndarray, score: np.ndarray, ks: tuple[int, ...]) -> dict:
    """Mean pytrec_eval measures over all clues; a missing answer is judged but never retrieved."""
    qrel: dict[str, dict[str, int]] = {}
    run: dict[str, dict[str, float]] = {}
    for i, (g, label, s) in enumerate(zip(groups, y, score, strict=True)):
        q = f"q{g}"
        run.setdefault(q, {})[f"d{i}"] = float(s)
        qrel.setdefault(q, {"missing": 1})
        if label:
            qrel[q] = {f"d{i}": 1}
    kk = ",".join(map(str, ks))
    ev = pytrec_eval.RelevanceEvaluator(qrel, {"recip_rank", f"success.{kk}", f"recall.{kk}"})
    per_query = ev.evaluate(run)
    names = next(iter(per_query.values())).keys()
    return {m: float(np.mean([v[m] for v in per_query.values()])) for m in names}


@pytest.mark.parametrize("seed", range(4))
def test_clue_metrics_equal_pytrec_eval(seed: int) -> None:
    # pytrec_eval (trec_eval): recip_rank = MRR, success_k = recall@k with one answer per query.
    ks = (1, 5, 10, 20)
    groups, y, prob, bm25 = _random_clues(seed)
    m = clue_metrics(groups, y, prob, bm25, ks=ks)
    ref_b = _trec(groups, y, bm25, ks)
    ref_r = _trec(groups, y, prob, ks)
    assert m["n_clues"] == 80
    assert m["mrr_bm25"] == pytest.approx(ref_b["recip_rank"], abs=1e-12)
    assert m["mrr_reranked"] == pytest.approx(ref_r["recip_rank"], abs=1e-12)
    for k in ks:
        assert m["recall_at_k"][k] == pytest.approx(ref_b[f"success_{k}"], abs=1e-12)
        assert m["recall_at_k"][k] == pytest.approx(ref_b[f"recall_{k}"], abs=1e-12)
    assert m["top1_bm25"] == pytest.approx(ref_b["success_1"], abs=1e-12)
    assert m["top1_reranked"] == pytest.approx(ref_r["success_1"], abs=1e-12)


def test_clue_metrics_top_candidate_hand_example() -> None:
    # Hand arithmetic from the definitions; Brier (1950) and Guo et al. (2017) for the top row.
    # clue 5: top by prob 0.8 (right); clue 9: top by prob 0.6 (wrong), answer at BM25 rank 2;
    # clue 2: answer missing, top prob 0.3 (wrong).
    groups = np.array([5, 9, 5, 9, 2, 9, 2])
    y = np.array([1, 0, 0, 1, 0, 0, 0])
    prob = np.array([0.8, 0.6, 0.1, 0.4, 0.3, 0.2, 0.3])
    bm25 = np.array([1.0, 9.0, 2.0, 8.0, 5.0, 7.0, 4.0])
    m = clue_metrics(groups, y, prob, bm25, ks=(1, 2))
    # BM25 ranks of the answers: clue 5 -> 2, clue 9 -> 2, clue 2 -> none.
    assert m["mrr_bm25"] == pytest.approx((0.5 + 0.5 + 0) / 3)
    assert m["recall_at_k"] == {1: 0.0, 2: pytest.approx(2 / 3)}
    # Reranked: clue 5 -> 1, clue 9 -> 2 (0.6 above 0.4), clue 2 -> none.
    assert m["mrr_reranked"] == pytest.approx((1 + 0.5 + 0) / 3)
    assert m["top1_reranked"] == pytest.approx(1 / 3) and m["top1_bm25"] == 0.0
    assert m["answer_in_candidates"] == pytest.approx(2 / 3)
    # Top rows (0.8, y=1), (0.6, y=0), (0.3, y=0): Brier = (0.04 + 0.36 + 0.09) / 3 = 0.163333
    assert m["top_candidate_brier"] == pytest.approx(0.49 / 3)
    # ECE: three bins of one row each: (|1-0.8| + |0-0.6| + |0-0.3|) / 3 = 1.1 / 3
    assert m["top_candidate_ece"] == pytest.approx(1.1 / 3)
    assert m["mean_top_probability"] == pytest.approx(1.7 / 3)
    assert sum(r["count"] for r in m["top_candidate_reliability"]) == 3


def test_clue_metrics_probability_ties_go_to_higher_bm25() -> None:
    # Tie rule documented in clue_metrics (own convention, no external source).
    m = clue_metrics([0, 0], [0, 1], [0.5, 0.5], [1.0, 2.0])
    assert m["top1_reranked"] == 1.0


def test_clue_metrics_rejects_bad_groups() -> None:
    with pytest.raises(ValueError, match="integer"):
        clue_metrics([0.5, 1.5], [0, 1], [0.1, 0.2], [1.0, 2.0])
    with pytest.raises(ValueError, match="bm25_score"):
        clue_metrics([0, 1], [0, 1], [0.1, 0.2], [1.0, float("nan")])


# --- by prefix ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Payoff:
    reward: float
    penalty: float


PREFIX_CASE = {
    "fractions": [0.5, 0.5, 0.5, 0.5, 1.0, 1.0, 1.0, 1.0],
    "groups": [0, 0, 1, 1, 2, 2, 3, 3],
    "y_true": [1, 0, 0, 1, 1, 0, 0, 1],
    "prob": [0.7, 0.2, 0.6, 0.3, 0.9, 0.1, 0.4, 0.5],
    "committed": [True, False, True, False, False, False, False, True],
}


@pytest.mark.parametrize("payoff", [{"reward": 1.0, "penalty": 3.0}, _Payoff(1.0, 3.0)])
def test_by_prefix_hand_example(payoff: object) -> None:
    # Hand arithmetic from the definition in by_prefix's docstring (own metric, no external source).
    # 0.5: g0 top right & committed right (+1), g1 top wrong & committed wrong (-3):
    #      top1 1/2, commit 2/2, accuracy when committed 1/2, payoff (1 - 3) / 2 = -1
    # 1.0: g2 top right, waits (0); g3 top 0.5 right, committed right (+1):
    #      top1 2/2, commit 1/2, accuracy when committed 1/1, payoff (0 + 1) / 2 = 0.5
    rows = by_prefix(**PREFIX_CASE, payoff=payoff)
    assert rows == [
        {
            "fraction": 0.5,
            "n_clues": 2,
            "top1_accuracy": 0.5,
            "commit_rate": 1.0,
            "accuracy_when_committed": 0.5,
            "mean_payoff": -1.0,
        },
        {
            "fraction": 1.0,
            "n_clues": 2,
            "top1_accuracy": 1.0,
            "commit_rate": 0.5,
            "accuracy_when_committed": 1.0,
            "mean_payoff": 0.5,
        },
    ]


def test_by_prefix_pays_less_for_a_late_right_answer() -> None:
    # Same case, reward falling by half across the clue (hand arithmetic, own metric):
    # 0.5: g0 right earns 1 x (1 - 0.5 x 0.5) = 0.75, g1 wrong -3: payoff (0.75 - 3) / 2 = -1.125
    # 1.0: g3 right earns 1 x (1 - 0.5 x 1.0) = 0.5, g2 waits: payoff 0.5 / 2 = 0.25
    rows = by_prefix(**PREFIX_CASE, payoff={"reward": 1.0, "penalty": 3.0, "reward_fall": 0.5})
    assert [r["mean_payoff"] for r in rows] == [-1.125, 0.25]


def test_by_prefix_nothing_committed_gives_none() -> None:
    case = dict(PREFIX_CASE, committed=[False] * 8)
    rows = by_prefix(**case, payoff={"reward": 1, "penalty": 1})
    assert all(r["accuracy_when_committed"] is None and r["mean_payoff"] == 0 for r in rows)


def test_by_prefix_rejects_inconsistent_input() -> None:
    two = dict(PREFIX_CASE, committed=[True, True, False, False, False, False, False, False])
    with pytest.raises(ValueError, match="group 0 has more than one committed"):
        by_prefix(**two, payoff={"reward": 1, "penalty": 1})
    mixed = dict(PREFIX_CASE, fractions=[0.5, 1.0, 0.5, 0.5, 1.0, 1.0, 1.0, 1.0])
    with pytest.raises(ValueError, match="same for every row"):
        by_prefix(**mixed, payoff={"reward": 1, "penalty": 1})
    with pytest.raises(ValueError, match="reward"):
        by_prefix(**PREFIX_CASE, payoff={"reward": 1})


# --- Wilson (1927) score intervals, checked against statsmodels' proportion_confint ----------


@pytest.mark.parametrize(
    ("successes", "n"), [(0, 1), (1, 1), (0, 10), (3, 10), (10, 10), (37, 120), (999, 1000)]
)
def test_wilson_interval_equals_statsmodels(successes: int, n: int) -> None:
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson"), alpha 0.05.
    low, high = wilson_interval(successes, n)
    ref_low, ref_high = proportion_confint(successes, n, alpha=0.05, method="wilson")
    assert low == pytest.approx(ref_low, abs=1e-12)
    assert high == pytest.approx(ref_high, abs=1e-12)
    assert 0.0 <= low <= successes / n + 1e-12 and successes / n <= high + 1e-12 <= 1.0 + 1e-12


def test_wilson_interval_worked_example() -> None:
    # Wilson (1927), 3 right of 10, z = 1.96: z^2/n = 0.38416, so the denominator is 1.38416;
    # centre (0.3 + 0.19208) / 1.38416 = 0.355508; half 1.96 / 1.38416 * sqrt(0.3 * 0.7 / 10 +
    # 3.8416 / 400) = 1.416022 * sqrt(0.030604) = 0.247719 -> (0.107789, 0.603227).
    low, high = wilson_interval(3, 10, z=1.96)
    assert low == pytest.approx(0.107789, abs=1e-6)
    assert high == pytest.approx(0.603227, abs=1e-6)
    assert wilson_interval(0, 0) == (0.0, 1.0)
    for bad in ((-1, 3), (4, 3)):
        with pytest.raises(ValueError, match="successes"):
            wilson_interval(*bad)


def test_reliability_bins_carry_statsmodels_wilson_intervals() -> None:
    rng = np.random.default_rng(5)
    p = rng.random(500)
    y = (rng.random(500) < p).astype(int)
    table = reliability_table(y, p)
    idx = np.minimum((p * 10).astype(int), 9)
    for i, row in enumerate(table):
        right, count = int(y[idx == i].sum()), int((idx == i).sum())
        assert row["count"] == count
        # Reference: statsmodels' proportion_confint(method="wilson") of the bin's counts.
        ref = proportion_confint(right, count, alpha=0.05, method="wilson")
        assert (row["ci_low"], row["ci_high"]) == pytest.approx(ref, abs=1e-12)
    empty = reliability_table([0, 1], [0.05, 0.15])[5]
    assert empty["count"] == 0 and empty["ci_low"] is None and empty["ci_high"] is None
