"""The serving path: clue -> BM25 candidates -> features -> probabilities -> decision."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from reranker import Payoff, Reranker, default_registry, load_model, rank_clue, rank_clues
from reranker import builtin as B
from reranker.examples import candidate_set
from reranker.train import TrainResult
from tests.reranker.conftest import World


@pytest.fixture(scope="module")
def model(world_trained: TrainResult, world_model_path: Path, world: World) -> Reranker:
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
    world: World, model: Reranker, clues: list[str]
) -> None:
    for clue in clues[:10]:
        r = rank_clue(world.index, model, clue, include_features=True)
        assert all(c.probability is not None for c in r.candidates)
        probs = [float(c.probability or 0.0) for c in r.candidates]
        assert probs == sorted(probs, reverse=True)
        assert {c.doc_id for c in r.candidates} == {h.doc_id for h in world.index.search(clue)}
        # each probability is the model's probability of the features served with it
        x = np.array([[c.features[n] for n in model.feature_names_] for c in r.candidates])
        np.testing.assert_array_equal(model.probability(x), probs)
        assert r.model_version == model.version
        # the qualifier served is the stored one (read from the per-row name cache)
        assert all(c.qualifier == world.index.document(c.doc_id).qualifier for c in r.candidates)


def test_include_features_returns_the_feature_values(world: World, model: Reranker) -> None:
    clue = "This river is known for"
    r = rank_clue(world.index, model, clue, include_features=True)
    hits = world.index.search(clue)
    cs = candidate_set(world.index, clue, hits)
    by_id = {c.doc_id: c for c in r.candidates}
    for name in ("bm25_score", "inlinks", "title_overlap", "matched_terms", "clue_words"):
        values = getattr(B, name)(cs)
        for h, v in zip(hits, values.tolist(), strict=True):
            assert by_id[h.doc_id].features[name] == v, name
    assert list(r.candidates[0].features) == model.feature_names_
    assert rank_clue(world.index, model, clue).candidates[0].features == {}
    # without a model, include_features gives every registered feature
    plain = rank_clue(world.index, None, clue, include_features=True)
    assert list(plain.candidates[0].features) == default_registry().names


def test_decision_uses_the_tuned_threshold_or_a_given_payoff(
    world: World, model: Reranker, world_trained: TrainResult, clues: list[str]
) -> None:
    r = rank_clue(world.index, model, clues[1])
    assert r.decision.threshold == world_trained.artifact["decision"]["threshold"]
    top = r.candidates[0]
    expected = "answer" if (top.probability or 0) >= r.decision.threshold else "wait"
    assert r.decision.action == expected
    r = rank_clue(world.index, model, clues[1], payoff=Payoff(1, 3))
    assert r.decision.threshold == 0.75
    low = rank_clue(world.index, model, clues[1], payoff=Payoff(1, 1e9), complete=True)
    assert low.decision.action == "abstain" and low.decision.doc_id is None


def test_rank_clues_equals_rank_clue_per_clue(
    world: World, model: Reranker, clues: list[str]
) -> None:
    batch = rank_clues(world.index, model, clues[:8], k=7, include_features=True)
    single = [rank_clue(world.index, model, c, k=7, include_features=True) for c in clues[:8]]
    assert batch == single


def test_clue_with_no_known_words(world: World, model: Reranker) -> None:
    r = rank_clue(world.index, model, "zzzz qqqq")
    assert r.candidates == [] and r.n_tokens == 2
    assert r.decision.action == "wait" and "no candidates" in r.decision.reason
