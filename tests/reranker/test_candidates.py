"""Candidate sets: BM25's top k or the hybrid pool, made the same way for training and serving."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from reranker import ModelFormatError, ModelMismatchError, load_model, rank_clue
from reranker.candidates import CandidatePolicy, find_candidates, search_pools
from reranker.training import build_table, read_logs
from reranker.training.train import TrainResult
from retriever import build_index, vecgen
from tests.reranker.conftest import World


def test_the_trained_model_records_how_its_candidates_were_made(
    world_trained: TrainResult, world: World
) -> None:
    a = world_trained.artifact
    tuning = a["training"]["fusion_tuning"]
    assert [r["weight"] for r in tuning] == [0.3, 0.5, 0.7, 0.85, 1.0]
    [chosen] = [r for r in tuning if r["chosen"]]
    # Chosen on whole clues (the prefixes favour other weights than the clues served whole):
    # BM25's own order (w 1.0) is kept unless the weight best on whole clues, ties going to
    # the higher weight, also gains over it when each of two folds (split by answer) is
    # scored with the weight the other fold chose.
    whole = {r["weight"]: r["recall_at_k_full_clue"] for r in tuning}
    top = max(whole.values())
    best = max(w for w, v in whole.items() if v == top)
    [bm25] = [r for r in tuning if r["weight"] == 1.0]
    held = bm25["held_out"]
    assert 0 <= held["recall_at_k_full_clue"] <= 1 and len(held["weights_by_fold"]) == 2
    assert held["bm25_order"] == whole[1.0]
    gains = held["recall_at_k_full_clue"] > whole[1.0]
    assert chosen["weight"] == (best if gains else 1.0)
    for r in tuning:
        assert len(r["recall_at_k_full_clue_by_fold"]) == 2
    refined = a["training"]["refined_vectors"]
    assert a["candidates"] == {"mode": "hybrid", "weight": chosen["weight"], "pool": 100,
                               "fusion": "minmax", "vectors": refined["served"]}  # fmt: skip
    # vectors refined on all clues for serving, one set per fold for the training rows
    assert len({refined["served"], *refined["folds"]}) == 3
    assert set(vecgen.names(world.index.path)) >= {refined["served"], *refined["folds"]}
    assert world_trained.model.candidates == CandidatePolicy.from_dict(a["candidates"])
    assert {"cosine", "in_both_pools"} <= set(a["feature_names"])


def test_serving_sees_the_rows_training_saw(world_trained: TrainResult, world: World) -> None:
    # The same clues through the training table and through rank_clue: identical candidate
    # sets, in the same order, with identical feature values.
    model = world_trained.model
    clues = read_logs([world.test_log])[:15]
    table = build_table(
        world.index,
        clues,
        model.registry,
        list(model.code_features),
        k=model.k,
        candidates=model.candidates,
    )
    full = np.flatnonzero(table.fraction == 1.0)
    groups = np.unique(table.group[full])
    assert groups.size >= 10
    for g, clue in zip(groups.tolist(), [c for c in clues if c.answer], strict=False):
        rows = table.group == g
        served = rank_clue(world.index, model, clue.clue, include_features=True)
        by_id = {c.doc_id: c for c in served.candidates}
        ids = world.index.ids.take(table.row[rows])
        assert set(ids) == set(by_id)
        x = np.array([[by_id[i].features[n] for n in model.feature_names] for i in ids])
        np.testing.assert_array_equal(x, table.X[rows])


def test_a_hybrid_set_is_ordered_by_real_bm25_scores(world: World) -> None:
    index = world.index
    assert index.dense is not None
    clues = [json.loads(line)["clue"] for line in world.test_log.read_text().splitlines()]
    tokens = [index.analyzer.tokens(c) for c in clues[:40]]
    policy = CandidatePolicy("hybrid", 0.3, 30)
    found = find_candidates(index, tokens, 10, policy)
    bm25_top = [set(h.row for h in hits) for hits in index.search_token_lists(tokens, 10)]
    took_from_vectors = 0
    for t, (hits, dense), top in zip(tokens, found, bm25_top, strict=True):
        assert dense is not None and len(hits) == dense.cosine.size
        scores = np.array([h.score for h in hits])
        full = index.score_tokens(t)
        rows = np.array([h.row for h in hits])
        np.testing.assert_array_equal(scores, full[rows])  # BM25's own numbers
        assert np.all(np.diff(scores) <= 0) and [h.rank for h in hits] == list(
            range(1, len(hits) + 1)
        )
        np.testing.assert_allclose(dense.cosine, index.dense.cosines(
            index.dense.vectors.query_vector(*index.term_ids(t)), rows), rtol=1e-6)  # fmt: skip
        took_from_vectors += len(set(rows.tolist()) - top)
    # with BM25's share at 0.3 the vectors bring articles BM25's top 10 did not have
    assert took_from_vectors > 0


def test_pools_are_searched_once_and_bm25_mode_ignores_vectors(world: World) -> None:
    index = world.index
    tokens = [index.analyzer.tokens("river town harbour")]
    [p] = search_pools(index, tokens, 25)
    assert p.bm25_rows.size <= 25 and p.dense_rows.size == 25
    [(hits, dense)] = find_candidates(index, tokens, 5, CandidatePolicy())
    assert dense is None
    assert [h.row for h in hits] == [h.row for h in index.search_tokens(tokens[0], 5)]


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("mode", "magic"),
        ("weight", 1.5),
        ("weight", "half"),
        ("pool", 0),
        ("fusion", "sum"),
        ("vectors", "../elsewhere"),
        ("vectors", 7),
    ],
)
def test_a_damaged_candidates_section_names_its_field(field: str, value: Any) -> None:
    data = dict(CandidatePolicy("hybrid", 0.5, 100).to_dict(), **{field: value})
    with pytest.raises(ModelFormatError, match=rf"m\.json: candidates\.{field}"):
        CandidatePolicy.from_dict(data, source="m.json")
    assert CandidatePolicy.from_dict(None) == CandidatePolicy()  # older files: BM25


def test_a_hybrid_model_refuses_an_index_without_vectors(
    world_trained: TrainResult, world_model_path: Path, world: World, tmp_path: Path
) -> None:
    plain = build_index(world.articles, tmp_path / "plain", vectors=False)
    with pytest.raises(ModelMismatchError, match="no word vectors"):
        load_model(world_model_path, index=plain)
    assert isinstance(load_model(world_model_path, index=world.index).k, int)


def test_bm25_candidates_on_request_train_as_before(world: World, tmp_path: Path) -> None:
    from reranker.training import train

    res = train(world.index, [world.train_log], tmp_path / "m.json", candidates="bm25")
    assert res.artifact["candidates"]["mode"] == "bm25"
    assert res.artifact["training"]["fusion_tuning"] == []
    assert not {"cosine", "in_both_pools"} & set(res.artifact["feature_names"])


def test_a_model_whose_refined_vectors_the_index_lacks_is_refused(
    world_trained: TrainResult, world_model_path: Path, world: World, tmp_path: Path
) -> None:
    # The same articles built again: same index, but without the generation training wrote.
    rebuilt = build_index(world.articles, tmp_path / "rebuilt", vectors=world.index.manifest[
        "vectors"]["settings"])  # fmt: skip
    name = world_trained.model.candidates.vectors
    with pytest.raises(ModelMismatchError, match=f"no vector generation {name}"):
        load_model(world_model_path, index=rebuilt)
    # Older model files (no "vectors" field) use the index's own vectors, as before.
    text = json.loads(world_model_path.read_text())
    del text["candidates"]["vectors"]
    assert CandidatePolicy.from_dict(text["candidates"]).vectors == ""


def test_training_rows_use_vectors_refined_without_their_own_labels(
    world_trained: TrainResult, world: World
) -> None:
    from reranker.training.refine import fold_of

    refined = world_trained.artifact["training"]["refined_vectors"]
    clues = [c for c in read_logs([world.train_log]) if c.answer][:40]
    folds = {fold_of(world.index, c) for c in clues}
    assert folds == {0, 1} and all(refined["clues_per_fold"])
    # Folds split by answer: no answer article in both.
    answers = [{world.index.resolve(c.answer) for c in clues if fold_of(world.index, c) == f}
               for f in (0, 1)]  # fmt: skip
    assert not answers[0] & answers[1]
    model = world_trained.model
    names = list(model.code_features)
    # The training table's rows of a fold-0 clue are those made with fold 1's vectors, which
    # never saw that clue; with the served vectors (refined on all) they differ.
    from reranker.training.refine import Refined

    crossfit = Refined(refined["served"], tuple(refined["folds"]),
                       {id(c): fold_of(world.index, c) for c in clues})  # fmt: skip
    both = build_table(world.index, clues, model.registry, names, k=model.k,
                       candidates=model.candidates,
                       policy_for=crossfit.policy_for(model.candidates))  # fmt: skip
    cos = names.index("cosine")
    for f in (0, 1):
        mine = [c for c in clues if fold_of(world.index, c) == f]
        other = CandidatePolicy.from_dict({**model.candidates.to_dict(),
                                           "vectors": refined["folds"][1 - f]})  # fmt: skip
        alone = build_table(world.index, mine, model.registry, names, k=model.k,
                            candidates=other)  # fmt: skip
        served = build_table(world.index, mine, model.registry, names, k=model.k,
                             candidates=model.candidates)  # fmt: skip
        rows = np.isin(both.clue_id, [i for i, c in enumerate(both.clues) if c in mine])
        np.testing.assert_array_equal(both.X[rows], alone.X)
        assert not np.array_equal(served.X[:, cos], alone.X[:, cos])
