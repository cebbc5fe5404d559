"""One distribution per clue: the presence model, the sharing out, and clue-level log-loss."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from reranker import ModelFormatError
from reranker.presence import (
    EVIDENCE,
    PresenceModel,
    distribute,
    distribute_groups,
    evidence,
    evidence_by_group,
)
from reranker.training.evaluate import Evaluation
from reranker.training.measures import clue_log_loss
from reranker.training.presence import PRESENCE_C, fit_presence
from reranker.training.train import TrainResult


def test_hand_worked_two_clue_example() -> None:
    # Clue A: pointwise p = (0.6, 0.3, 0.3), P(among) = 0.9, the first candidate is right.
    # Shares: 0.6 / 1.2 * 0.9 = 0.45 and 0.225 twice; none of these = 0.1.
    # Clue B: p = (0.2, 0.1), P(among) = 0.4, no candidate is right.
    # Shares: 0.2 / 0.3 * 0.4 = 0.2667 and 0.1333; none of these = 0.6.
    # Clue-level log-loss = (-ln 0.45 - ln 0.6) / 2 = (0.798508 + 0.510826) / 2 = 0.654667.
    qa = distribute(np.array([0.6, 0.3, 0.3]), 0.9)
    qb = distribute(np.array([0.2, 0.1]), 0.4)
    np.testing.assert_allclose(qa, [0.45, 0.225, 0.225], rtol=1e-12)
    np.testing.assert_allclose(qb, [0.4 * 2 / 3, 0.4 / 3], rtol=1e-12)
    groups = np.array([0, 0, 0, 1, 1])
    y = np.array([1, 0, 0, 0, 0])
    q = np.r_[qa, qb]
    assert clue_log_loss(groups, y, q) == pytest.approx(0.654667, abs=1e-6)
    # The same number from scikit-learn's multiclass log_loss: each clue is one draw from
    # (its candidates..., none of these), padded to equal width with zero-probability slots.
    rows = np.array([[*qa, 0.1], [*qb, 0.0, 0.6]])
    truth = [0, 3]  # clue A: its first candidate; clue B: the "none" column
    assert clue_log_loss(groups, y, q) == pytest.approx(
        log_loss(truth, rows, labels=[0, 1, 2, 3]), abs=1e-12
    )


def test_the_table_path_gives_the_hand_worked_shares() -> None:
    # The two clues above through distribute_groups, as evaluation calls it. A presence model
    # reading only sum_p (mean 0, scale 1) with coef c and intercept b gives P(among) 0.9 for
    # clue A (sum 1.2) and 0.4 for clue B (sum 0.3) when
    #   1.2 c + b = logit(0.9) = ln 9 and 0.3 c + b = logit(0.4) = ln(2/3),
    # so c = (ln 9 - ln(2/3)) / 0.9 and b = ln 9 - 1.2 c.
    c = (math.log(9) - math.log(2 / 3)) / 0.9
    model = PresenceModel(
        mean=np.zeros(len(EVIDENCE)),
        scale=np.ones(len(EVIDENCE)),
        coef=np.array([c, 0, 0, 0, 0]),
        intercept=math.log(9) - 1.2 * c,
    )
    groups = np.array([0, 0, 0, 1, 1])
    p = np.array([0.6, 0.3, 0.3, 0.2, 0.1])
    q, among = distribute_groups(model, groups, p, np.ones(5), np.full(5, 6))
    np.testing.assert_allclose(among, [0.9, 0.4], rtol=1e-12)
    np.testing.assert_allclose(q, [0.45, 0.225, 0.225, 0.4 * 2 / 3, 0.4 / 3], rtol=1e-12)
    assert clue_log_loss(groups, np.array([1, 0, 0, 0, 0]), q) == pytest.approx(0.654667, abs=1e-6)


def test_a_pointwise_sum_past_one_is_clipped_not_negative() -> None:
    # p sums to 1.3 in a clue whose answer is missing: "none" would be -0.3; it is clipped.
    loss = clue_log_loss(np.array([0, 0]), np.array([0, 0]), np.array([0.7, 0.6]))
    assert loss == pytest.approx(-math.log(1e-15))


def test_grouped_evidence_equals_evidence_of_each_group() -> None:
    rng = np.random.default_rng(3)
    sizes = rng.integers(1, 9, size=40)
    group = np.repeat(np.arange(sizes.size), sizes)
    p = rng.uniform(0, 1, group.size)
    scores = rng.gamma(2.0, 3.0, group.size)
    scores[group == 5] = 0.0  # a set whose scores are all 0: spread is 1
    words = np.repeat(rng.integers(1, 40, sizes.size), sizes)
    starts, E = evidence_by_group(group, p, scores, words)
    assert E.shape == (sizes.size, len(EVIDENCE))
    for g, s in enumerate(starts.tolist()):
        rows = group == g
        np.testing.assert_allclose(E[g], evidence(p[rows], scores[rows], int(words[s])), rtol=1e-12)


def test_presence_model_reproduces_scikit_learn(demo_trained: TrainResult) -> None:
    # The stored numbers give scikit-learn's own predict_proba of the same fit to 1e-9.
    table = demo_trained.table
    p = demo_trained.estimator.oof_proba_
    model, _ = fit_presence(table, p)
    starts, E = evidence_by_group(table.group, p, table.score, table.words)
    found = np.maximum.reduceat(table.y.astype(int), starts)
    reference = make_pipeline(
        StandardScaler(),
        LogisticRegression(C=PRESENCE_C, solver="newton-cholesky", max_iter=5000, tol=1e-8),
    ).fit(E, found)
    assert 0 < found.mean() < 1  # the demo has clues whose answer BM25 does not find
    np.testing.assert_allclose(
        model.probability(E), reference.predict_proba(E)[:, 1], atol=1e-9, rtol=0
    )


def test_the_trained_artifact_serves_the_same_distribution(world_trained: TrainResult) -> None:
    served = world_trained.model
    table = world_trained.table
    p = served.probability(table.X)
    q, among = distribute_groups(served.presence, table.group, p, table.score, table.words)
    starts = np.flatnonzero(np.r_[True, table.group[1:] != table.group[:-1]])
    for g, s in enumerate(starts[:30].tolist()):
        rows = table.group == table.group[s]
        q1, a1 = served.distribution(p[rows], table.score[rows], int(table.words[s]))
        np.testing.assert_allclose(q[rows], q1, rtol=1e-12)
        assert among[g] == pytest.approx(a1, rel=1e-12)
        assert q1.sum() == pytest.approx(a1, rel=1e-12) and 0 < a1 < 1


def test_one_label_gives_a_constant_smoothed_rate() -> None:
    from reranker.training import presence as tp

    E = np.random.default_rng(0).normal(size=(9, len(EVIDENCE)))
    model = tp._fit(E, np.ones(9, dtype=int))
    np.testing.assert_allclose(model.probability(E), 9.5 / 10)


def test_the_distribution_beats_pointwise_on_clue_log_loss(demo_evaluation: Evaluation) -> None:
    # The point of sharing out P(among): pointwise probabilities overstate clues whose answer
    # is missing and sum past 1; the distribution must do better on the held-out demo clues.
    clue = demo_evaluation.metrics["clue"]
    assert clue["clue_log_loss"] < clue["clue_log_loss_pointwise"]


def _section() -> dict[str, Any]:
    return PresenceModel(
        mean=np.zeros(5), scale=np.ones(5), coef=np.arange(5.0), intercept=0.5
    ).to_dict()


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("evidence", ["sum_p"]),
        ("mean", [0.0, 0.0]),
        ("scale", [1.0, 1.0, 0.0, 1.0, 1.0]),
        ("coef", [1.0, float("nan"), 0.0, 0.0, 0.0]),
        ("coef", "many"),
        ("intercept", "high"),
        ("intercept", float("inf")),
        ("intercept", True),
    ],
)
def test_a_damaged_section_is_refused_naming_the_field(field: str, value: Any) -> None:
    data = dict(_section(), **{field: value})
    with pytest.raises(ModelFormatError, match=rf"m\.json: presence.*{field}"):
        PresenceModel.from_dict(data, source="m.json")


def test_a_missing_section_is_refused() -> None:
    with pytest.raises(ModelFormatError, match="presence must be an object"):
        PresenceModel.from_dict(None, source="m.json")
    assert PresenceModel.from_dict(_section()).to_dict() == _section()
