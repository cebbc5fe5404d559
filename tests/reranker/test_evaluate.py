"""evaluate() and the trained demo model against baselines on held-out clues."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from reranker import load_model
from reranker.training import build_table, read_logs, train
from reranker.training.evaluate import Evaluation, evaluate
from reranker.training.measures import baseline_all_wrong
from reranker.training.table import TrainingTable
from reranker.training.train import TrainResult
from retriever import Index
from tests.reranker.conftest import World

GROUPS = ("retrieval", "length", "popularity", "qualifier", "leakage", "overlap", "dense")


@pytest.fixture(scope="module")
def held_out(demo_trained: TrainResult, demo_index: Index, demo_dir: Path) -> TrainingTable:
    """Candidate rows of the demo test split, featurized with the trained model's features."""
    model = demo_trained.model
    clues = read_logs([demo_dir / "questions_test.jsonl"])
    return build_table(demo_index, clues, model.registry, model.feature_names)


@pytest.mark.slow
def test_trained_model_beats_both_baselines_on_held_out_clues(
    demo_trained: TrainResult, demo_score_only: TrainResult, held_out: TrainingTable
) -> None:
    y = held_out.y
    assert 0 < y.sum() < y.size and held_out.n_clues > 100
    p_model = demo_trained.model.probability(held_out.X)
    p_score = demo_score_only.model.probability(held_out.columns(["bm25_score"]))
    # The all-wrong baseline forecasts the base rate for every candidate (training.measures);
    # scikit-learn's log_loss and brier_score_loss score all three forecasts the same way.
    rate = np.full(y.size, y.mean())
    for metric in (log_loss, brier_score_loss):
        model, score, wrong = (metric(y, p, labels=[0, 1]) for p in (p_model, p_score, rate))
        assert model < score, metric.__name__
        assert model < wrong, metric.__name__
    base = baseline_all_wrong(y)
    assert base["log_loss"] == pytest.approx(log_loss(y, rate))
    assert base["brier"] == pytest.approx(y.mean() * (1 - y.mean()))  # Brier (1950), constant


@pytest.mark.slow
def test_reranked_top1_at_least_bm25_top1(
    demo_trained: TrainResult, held_out: TrainingTable
) -> None:
    # Per full clue: is the best-probability candidate right, and is the BM25 rank-1 one right?
    p = demo_trained.model.probability(held_out.X)
    full = held_out.fraction == 1.0
    reranked = bm25 = 0
    groups = np.unique(held_out.group[full])
    for g in groups:
        sel = np.flatnonzero(held_out.group == g)
        reranked += int(held_out.y[sel[np.argmax(p[sel])]])
        bm25 += int(held_out.y[sel[held_out.rank[sel] == 1]].sum())
    assert reranked >= bm25
    print(f"top-1 on {groups.size} held-out clues: bm25 {bm25}, reranked {reranked}")


@pytest.mark.slow
def test_evaluation_metrics_and_report_files(
    demo_evaluation: Evaluation, demo_trained: TrainResult, demo_dir: Path
) -> None:
    m = demo_evaluation.metrics
    cand = m["candidate"]
    for key in ("log_loss", "brier"):
        assert cand["model"][key] < cand["bm25_only"][key]
        assert cand["model"][key] < cand["all_wrong"][key]
    assert m["clue"]["top1_reranked"] >= m["clue"]["top1_bm25"]
    assert m["data"]["model_version"] == demo_trained.artifact["model_version"]
    report = demo_dir / "report"
    on_disk = json.loads((report / "metrics.json").read_text())
    assert on_disk["candidate"]["model"]["log_loss"] == pytest.approx(cand["model"]["log_loss"])
    assert (report / "report.html").read_text().lstrip().lower().startswith("<!doctype html")
    pngs = sorted(report.glob("*.png"))
    assert len(pngs) >= 4
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    assert demo_evaluation.paths["report"] == report / "report.html"
    assert "top-1 accuracy" in demo_evaluation.summary


@pytest.mark.slow
def test_ablation_rows(demo_evaluation: Evaluation) -> None:
    rows = demo_evaluation.ablation
    kinds = [r["kind"] for r in rows]
    assert kinds[0] == "baseline" and rows[0]["features"] == ["bm25_score"]
    assert kinds[-1] == "full"
    assert [r["name"] for r in rows if r["kind"] == "alone"] == [f"{g} alone" for g in GROUPS]
    assert [r["name"] for r in rows if r["kind"] == "forward"] == [f"+ {g}" for g in GROUPS]
    assert [r["name"] for r in rows if r["kind"] == "drop-one"] == [f"- {g}" for g in GROUPS]
    forward = [r for r in rows if r["kind"] == "forward"]
    assert set(forward[-1]["features"]) == set(rows[-1]["features"])
    for r in rows:
        assert r["log_loss"] > 0 and 0 < r["brier"] < 1
    # the full feature set beats the score alone on held-out folds
    assert rows[-1]["log_loss"] < rows[0]["log_loss"]


# -- small world: quick checks of evaluate's options ---------------------------------------------
def test_evaluate_without_ablation_and_with_a_payoff(
    world: World, world_trained: TrainResult, world_model_path: Path, tmp_path: Path
) -> None:
    from reranker import Payoff

    model = load_model(world_model_path, index=world.index)
    ev = evaluate(
        world.index,
        model,
        [world.test_log],
        tmp_path / "rep",
        payoff=Payoff(1, 3),
        run_ablation=False,
    )
    assert ev.ablation == []
    assert ev.metrics["decision"]["threshold"] == 0.75
    assert ev.metrics["data"]["clues"] == len(world.test_log.read_text().splitlines())
    assert (tmp_path / "rep" / "metrics.json").exists()


def test_evaluate_a_model_without_the_bm25_score_feature(world: World, tmp_path: Path) -> None:
    res = train(
        world.index,
        [world.train_log],
        tmp_path / "m.json",
        features=["inverse_rank", "matched_terms", "title_overlap"],
    )
    ev = evaluate(world.index, res.model, [world.test_log], tmp_path / "rep", n_folds=3)
    assert ev.ablation[0]["kind"] == "baseline"
    assert ev.metrics["candidate"]["bm25_only"]["n"] == ev.metrics["candidate"]["model"]["n"]


def test_evaluate_refuses_a_k_other_than_the_models(
    world: World, world_trained: TrainResult, world_model_path: Path, tmp_path: Path
) -> None:
    model_k = world_trained.artifact["training"]["k"]
    model = load_model(world_model_path, index=world.index)
    for bad in (model_k - 5, model_k + 1):
        with pytest.raises(ValueError, match=rf"-k {bad}\b.*model's k \({model_k}\)"):
            evaluate(world.index, model, [world.test_log], tmp_path / "rep", k=bad)
        assert not (tmp_path / "rep").exists()
    ev = evaluate(
        world.index, model, [world.test_log], tmp_path / "rep", k=model_k, run_ablation=False
    )
    assert ev.metrics["data"]["k"] == model_k
