"""train(): logs -> table -> grouped-CV fit -> tuned threshold -> JSON artifact."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from reranker import (
    LabelledLogError,
    Payoff,
    TrainingError,
    default_registry,
    load_model,
    rank_clue,
)
from reranker.decision import tune_threshold
from reranker.training import PrefixPlan, read_logs, train
from reranker.training.train import TrainResult, prefix_tops
from tests.reranker.conftest import World

Writer = Callable[[Path, Iterable[Any]], Path]


def test_artifact_describes_the_training(
    world_trained: TrainResult, world_model_path: Path, world: World
) -> None:
    art = json.loads(world_model_path.read_text())
    assert art == json.loads(json.dumps(world_trained.artifact))
    t = art["training"]
    records = [json.loads(x) for x in world.train_log.read_text().splitlines()]
    assert t["clues"] == len(records) - world.n_unresolved_train
    # Reference for the checksum: hashlib.sha256 of the log's bytes.
    assert t["checksum"] == hashlib.sha256(world.train_log.read_bytes()).hexdigest()
    assert t["prefix_plan"] == {"fractions": [0.2, 0.4, 0.6, 0.8, 1.0], "every_words": None}
    assert t["k"] == 20 and t["skipped_lines"] == 0
    table = world_trained.table
    assert (t["rows"], t["positives"]) == (table.y.size, int(table.y.sum()))
    assert t["recall_at_k_full_clue"] == table.recall()
    assert art["feature_names"] == default_registry().names
    assert art["index_version"] == world.index.version
    assert art["feature_set_version"] == 1 and art["user_features"] == []


def test_unresolved_answers_are_counted_and_listed(
    world_trained: TrainResult, world: World
) -> None:
    t = world_trained.artifact["training"]
    assert t["unresolved_count"] == world.n_unresolved_train == len(world_trained.table.unresolved)
    assert [u["answer"] for u in t["unresolved_answers"]] == ["No Such Place", "w999"]
    n_lines = len(world.train_log.read_text().splitlines())
    assert [u["line"] for u in t["unresolved_answers"]] == [n_lines - 1, n_lines]
    assert all(u["file"] == str(world.train_log) for u in t["unresolved_answers"])
    assert any("2 gold answers matched no article" in n for n in world_trained.notes)


def test_threshold_is_tuned_on_out_of_fold_probabilities(world_trained: TrainResult) -> None:
    d = world_trained.artifact["decision"]
    assert d["break_even"] == 0.5
    assert d["payoff"] == {"reward": 1.0, "penalty": 1.0, "reward_fall": 0.0, "cost_per_word": 0.0}
    tops = prefix_tops(world_trained.table, world_trained.oof_distribution)
    again = tune_threshold(tops["clue"], tops["fraction"], tops["prob"], tops["right"], Payoff())
    assert d["threshold"] == again["threshold"] == d["tuned_on_held_out"]["threshold"]
    assert d["at_break_even"]["threshold"] == 0.5
    # one row per clue prefix, holding that prefix's best candidate
    table = world_trained.table
    assert tops["group"].size == np.unique(table.group).size
    for g, p in zip(tops["group"][:20].tolist(), tops["prob"][:20].tolist(), strict=True):
        assert p == world_trained.oof_distribution[table.group == g].max()


def test_trained_model_serves_like_the_loaded_one(
    world_trained: TrainResult, world_model_path: Path, world: World
) -> None:
    loaded = load_model(world_model_path, index=world.index)
    clue = "This song is known for"
    a = rank_clue(world.index, world_trained.model, clue)
    b = rank_clue(world.index, loaded, clue)
    assert a.candidates == b.candidates and a.decision == b.decision


def test_options_reach_the_artifact(world: World, tmp_path: Path) -> None:
    res = train(
        world.index,
        [world.train_log],
        tmp_path / "m.json",
        k=5,
        plan=PrefixPlan(every_words=3),
        features=["bm25_score", "matched_terms", "title_overlap"],
        calibration="isotonic",
        payoff=Payoff(1, 3),
    )
    art = json.loads((tmp_path / "m.json").read_text())
    assert art["feature_names"] == ["bm25_score", "matched_terms", "title_overlap"]
    assert art["calibration"]["method"] == "isotonic"
    assert art["training"]["k"] == 5
    assert art["training"]["prefix_plan"]["every_words"] == 3
    assert art["decision"]["break_even"] == 0.75
    assert art["decision"]["payoff"]["penalty"] == 3.0
    # every prefix keeps at most k candidates
    assert np.bincount(res.table.group).max() <= 5
    # the prefixes are every 3 words, plus the whole clue
    clues = [c for c in read_logs([world.train_log]) if world.index.resolve(c.answer or "")]
    expected = sum(len(PrefixPlan(every_words=3).cuts(len(c.clue.split()))) for c in clues)
    assert res.table.n_prefixes == expected


def test_bad_line_stops_training_and_keeps_the_old_model(
    world: World, tmp_path: Path, jsonl: Writer
) -> None:
    good = world.train_log.read_text().splitlines()
    log = jsonl(tmp_path / "log.jsonl", [*good[:30], '{"clue": "x"', *good[30:]])
    out = tmp_path / "model.json"
    out.write_text("previous model")
    with pytest.raises(LabelledLogError, match=r"line 31: malformed JSON"):
        train(world.index, [log], out)
    assert out.read_text() == "previous model"
    res = train(world.index, [log], out, skip_bad=True, features=["bm25_score"])
    assert res.log_report.skipped == 1
    assert json.loads(out.read_text())["training"]["skipped_lines"] == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["log.jsonl", "model.json"]


def test_no_resolvable_answers_is_a_training_error(
    world: World, tmp_path: Path, jsonl: Writer
) -> None:
    log = jsonl(
        tmp_path / "log.jsonl",
        [{"clue": f"This river is known for {i}", "answer": "Nowhere"} for i in range(20)],
    )
    with pytest.raises(TrainingError):
        train(world.index, [log], tmp_path / "m.json")
    assert not (tmp_path / "m.json").exists()


def test_fitting_shows_progress_when_asked(
    world: World, tmp_path: Path, capfd: pytest.CaptureFixture[str]
) -> None:
    train(world.index, [world.train_log], tmp_path / "quiet.json", features=["retrieval"])
    assert "fitting" not in capfd.readouterr().err
    train(
        world.index, [world.train_log], tmp_path / "m.json", features=["retrieval"], progress=True
    )
    err = capfd.readouterr().err
    # tqdm's bar: one step per (C, fold) fit plus the final fit, e.g. "fitting: 100%|...| 26/26"
    assert "fitting" in err and "26/26" in err
