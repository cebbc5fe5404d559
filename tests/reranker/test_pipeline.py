"""The serving path: clue -> BM25 candidates -> features -> probabilities -> decision."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from reranker import Payoff, ServedModel, default_registry, load_model, rank_clue, rank_clues
from reranker.features import builtin as B
from reranker.features import candidate_set
from reranker.training.train import TrainResult
from tests.reranker.conftest import World


@pytest.fixture(scope="module")
def model(world_trained: TrainResult, world_model_path: Path, world: World) -> ServedModel:
    """The small world's model as a server loads it."""
    return load_model(world_model_path, index=world.index)


@pytest.fixture(scope="module")
def clues(world: World) -> list[str]:
    """Held-out clues of the small world."""
    return [json.loads(line)["clue"] for line in world.test_log.read_text().splitlines()]


def test_without_a_model_candidates_are_in_bm25_order(world: World, clues: list[str]) -> None:
    r = rank_clue(world.index, None, clues[0], k=10)
    hits = world.index.search(clues[0], k=10)
    assert [c.doc_id for c in r.candidates] == [h.doc_id for h in hits]
    assert [c.score for c in r.candidates] == [h.score for h in hits]
    assert all(c.probability is None and c.features == {} for c in r.candidates)
    assert r.model_version is None and r.index_version == world.index.version
    assert r.decision.action == "wait" and "BM25" in r.decision.reason
    assert rank_clue(world.index, None, clues[0], complete=True).decision.action == "abstain"


def test_with_a_model_candidates_are_sorted_by_probability(
    world: World, model: ServedModel, clues: list[str]
) -> None:
    for clue in clues[:10]:
        r = rank_clue(world.index, model, clue, include_features=True)
        assert all(c.probability is not None for c in r.candidates)
        probs = [float(c.probability or 0.0) for c in r.candidates]
        assert probs == sorted(probs, reverse=True)
        assert {c.doc_id for c in r.candidates} == {h.doc_id for h in world.index.search(clue)}
        # each pointwise probability is the model's probability of the features served with it
        x = np.array([[c.features[n] for n in model.feature_names] for c in r.candidates])
        np.testing.assert_array_equal(model.probability(x), [c.pointwise for c in r.candidates])
        # the probabilities are one distribution: shares of P(among), plus "none of these"
        assert r.in_candidates is not None and r.none_of_these is not None
        assert abs(sum(probs) + r.none_of_these - 1.0) < 1e-12
        p = np.array([c.pointwise for c in r.candidates])
        np.testing.assert_allclose(probs, p / p.sum() * r.in_candidates, rtol=1e-12)
        assert r.model_version == model.version
        # the qualifier served is the stored one (read from the per-row name cache)
        assert all(c.qualifier == world.index.document(c.doc_id).qualifier for c in r.candidates)


def test_include_features_returns_the_feature_values(world: World, model: ServedModel) -> None:
    clue = "This river is known for"
    r = rank_clue(world.index, model, clue, include_features=True)
    hits = world.index.search(clue)
    cs = candidate_set(world.index, clue, hits)
    by_id = {c.doc_id: c for c in r.candidates}
    for name in ("bm25_score", "inlinks", "title_overlap", "matched_terms", "clue_words"):
        values = getattr(B, name)(cs)
        for h, v in zip(hits, values.tolist(), strict=True):
            assert by_id[h.doc_id].features[name] == v, name
    assert list(r.candidates[0].features) == model.feature_names
    assert rank_clue(world.index, model, clue).candidates[0].features == {}
    # without a model, include_features gives every registered feature
    plain = rank_clue(world.index, None, clue, include_features=True)
    assert list(plain.candidates[0].features) == default_registry().names


def test_decision_uses_the_tuned_threshold_or_a_given_payoff(
    world: World, model: ServedModel, world_trained: TrainResult, clues: list[str]
) -> None:
    r = rank_clue(world.index, model, clues[1])
    # no share revealed given: the schedule's whole-clue threshold
    whole = world_trained.artifact["decision"]["schedule"]["thresholds"][-1]
    assert (r.decision.threshold, r.decision.basis) == (whole, "whole_clue")
    top = r.candidates[0]
    expected = "answer" if (top.probability or 0) >= r.decision.threshold else "wait"
    assert r.decision.action == expected
    r = rank_clue(world.index, model, clues[1], payoff=Payoff(1, 3))
    assert r.decision.threshold == 0.75
    low = rank_clue(world.index, model, clues[1], payoff=Payoff(1, 1e9), complete=True)
    assert low.decision.action == "abstain" and low.decision.doc_id is None


def test_rank_clues_equals_rank_clue_per_clue(
    world: World, model: ServedModel, clues: list[str]
) -> None:
    batch = rank_clues(world.index, model, clues[:8], k=7, include_features=True)
    single = [rank_clue(world.index, model, c, k=7, include_features=True) for c in clues[:8]]
    assert batch == single


def test_rank_clues_on_threads_equals_one_thread(
    world: World, model: ServedModel, clues: list[str]
) -> None:
    # Each thread ranks its share of the batch; the order and every number stay the same.
    one = rank_clues(world.index, model, clues[:30], k=5, include_features=True, threads=1)
    two = rank_clues(world.index, model, clues[:30], k=5, include_features=True, threads=2)
    assert two == one
    with pytest.raises(ValueError, match="threads"):
        rank_clues(world.index, model, clues[:3], threads=0)


def test_clue_with_no_known_words(world: World, model: ServedModel) -> None:
    r = rank_clue(world.index, model, "zzzz qqqq")
    assert r.candidates == [] and r.n_tokens == 2
    assert r.decision.action == "wait" and "no candidates" in r.decision.reason


# -- the requested k only cuts the reply: features are always over the model's k ---------------
def test_probabilities_and_decisions_do_not_depend_on_the_requested_k(
    world: World, model: ServedModel, world_trained: TrainResult, clues: list[str]
) -> None:
    model_k = world_trained.artifact["training"]["k"]
    checked = 0
    for clue in clues[:12]:
        full = rank_clue(world.index, model, clue, k=model_k)
        assert len(full.candidates) == model_k  # the world matches every clue widely
        for k in range(1, model_k + 1):
            r = rank_clue(world.index, model, clue, k=k)
            # the reply is the model-k reply cut to k: same ids, same probabilities, same order
            assert r.candidates == full.candidates[:k], (clue, k)
            assert r.decision == full.decision, (clue, k)
            checked += 1
    assert checked == 12 * model_k


def test_rank_clues_at_any_k_is_the_model_k_reply_cut(
    world: World, model: ServedModel, world_trained: TrainResult, clues: list[str]
) -> None:
    model_k = world_trained.artifact["training"]["k"]
    full = rank_clues(world.index, model, clues[:6], k=model_k, include_features=True)
    for k in (1, 2, 3, 7, model_k - 1):
        cut = rank_clues(world.index, model, clues[:6], k=k, include_features=True)
        for a, b in zip(cut, full, strict=True):
            assert a.candidates == b.candidates[:k] and a.decision == b.decision


def test_a_k_above_the_models_is_refused_and_none_means_the_models(
    world: World, model: ServedModel, world_trained: TrainResult, clues: list[str]
) -> None:
    model_k = world_trained.artifact["training"]["k"]
    for bad in (model_k + 1, 0):
        with pytest.raises(ValueError, match=rf"k={bad}\b.*model's k={model_k}\b"):
            rank_clue(world.index, model, clues[0], k=bad)
        with pytest.raises(ValueError, match=rf"k={bad}\b.*model's k={model_k}\b"):
            rank_clues(world.index, model, clues[:2], k=bad)
    r = rank_clue(world.index, model, clues[0])
    assert len(r.candidates) == model_k
    assert (r.k, r.model_k) == (model_k, model_k)
    assert rank_clue(world.index, model, clues[0], k=3).k == 3
    # without a model there is no model k: k is just how many BM25 candidates to return
    plain = rank_clue(world.index, None, clues[0], k=model_k + 5)
    assert len(plain.candidates) == model_k + 5 and plain.model_k is None


def test_a_model_with_a_damaged_k_is_refused_at_load(
    world: World, world_trained: TrainResult, world_model_path: Path, tmp_path: Path
) -> None:
    from reranker import ModelFormatError

    data = json.loads(world_model_path.read_text())
    for bad in (0, "20", 2.5, True):
        data["training"]["k"] = bad
        path = tmp_path / "model.json"
        path.write_text(json.dumps(data))
        with pytest.raises(ModelFormatError, match=r"training\.k must be a positive integer"):
            load_model(path, index=world.index)
