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


def reversed_score_model(world: World, folder: Path) -> Path:
    """A deliberately poor model file: the BM25-score-only model with its coefficient negated,
    so it puts the retriever's order upside down and must lose to it on top-1."""
    train(
        world.index,
        [world.train_log],
        folder / "score_only.json",
        features=["bm25_score"],
        calibration="none",
    )
    art = json.loads((folder / "score_only.json").read_text())
    art["coef"] = [-c for c in art["coef"]]
    path = folder / "reversed.json"
    path.write_text(json.dumps(art))
    return path


def test_report_page_explains_itself_and_warns_when_a_baseline_wins(
    world: World, tmp_path: Path
) -> None:
    from html.parser import HTMLParser

    model = load_model(reversed_score_model(world, tmp_path), index=world.index)
    ev = evaluate(world.index, model, [world.test_log], tmp_path / "rep", n_folds=3)
    m = ev.metrics
    clue = m["clue"]
    assert clue["top1_reranked"] < clue["top1_bm25"]  # upside down: it must lose
    lost = (
        "the model loses to the baseline 'retrieval score alone' on top-1 accuracy: "
        f"{clue['top1_reranked']:.3f} against {clue['top1_bm25']:.3f}"
    )
    assert any(w.startswith(lost) for w in ev.warnings)
    on_disk = json.loads((tmp_path / "rep" / "metrics.json").read_text())
    assert [w["message"] for w in on_disk["warnings"]] == ev.warnings

    # The header: what was trained (from the model file) and what was evaluated.
    art = model.artifact
    about = on_disk["about"]
    assert about["model"]["version"] == model.version
    assert about["model"]["trained_at"] == art["created_at"]
    assert about["model"]["training_logs"] == [str(world.train_log)]
    assert about["model"]["training_clues"] == art["training"]["clues"]
    assert about["model"]["feature_groups"] == {"retrieval": ["bm25_score"]}
    assert about["evaluation"]["logs"] == [str(world.test_log)]
    assert about["evaluation"]["clues"] == len(world.test_log.read_text().splitlines())

    class Sections(HTMLParser):
        """Text of each <section> by id, and the classes of its elements (stdlib html.parser)."""

        def __init__(self) -> None:
            super().__init__()
            self.text: dict[str, str] = {}
            self.classes: dict[str, set[str]] = {}
            self.order: list[str] = []

        def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
            a = dict(attrs)
            if tag == "section":
                self.order.append(a.get("id") or "")
            elif self.order:
                self.classes.setdefault(self.order[-1], set()).add(a.get("class") or "")

        def handle_data(self, data: str) -> None:
            if self.order:
                self.text[self.order[-1]] = self.text.get(self.order[-1], "") + data

    page = Sections()
    page.feed((tmp_path / "rep" / "report.html").read_text(encoding="utf-8"))
    assert page.order[:2] == ["warnings", "about"]  # visible first
    assert "warning" in page.classes["warnings"] and lost in page.text["warnings"]
    about_text = page.text["about"]
    for shown in (str(world.train_log), str(world.test_log), model.version, art["created_at"]):
        assert shown in about_text
    assert "the saved model as trained" in about_text
    assert "refit by 3-fold cross-validation grouped by clue on the evaluated clues" in about_text
    assert "'full model' included" in about_text and "not the saved model" in about_text
    # The ablation names groups, and lists each group's features once.
    assert page.text["ablation"].count("bm25_score") == 1

    # Worst-missed clues: each row is a clue of the evaluated file, worst first.
    missed = on_disk["worst_missed"]
    assert 0 < len(missed) <= 10
    lines = world.test_log.read_text().splitlines()
    for r in missed:
        src = json.loads(lines[r["line"] - 1])
        assert (r["clue"], r["answer"], r["file"]) == (
            src["clue"],
            src["answer"],
            str(world.test_log),
        )
        assert r["answer_rank"] is None or r["answer_rank"] > 1
        probs = [t["probability"] for t in r["top"]]
        assert len(probs) == 3 and probs == sorted(probs, reverse=True)
    ranks = [r["answer_rank"] or 10**6 for r in missed]
    assert ranks == sorted(ranks, reverse=True)
    assert missed[0]["top"][0]["title"] in page.text["worst-missed"]
