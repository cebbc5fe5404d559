"""Which comparisons the model loses, and how the warnings word them."""

from __future__ import annotations

from reranker.training.comparisons import (
    ALL_WRONG,
    MODEL,
    SCORE_ALONE,
    fitting_notes,
    model_losses,
    same_logs_warning,
)

# Figures of the demo's held-out evaluation (288 clues), as its report printed them.
BASELINES = [
    {"name": MODEL, "top1": 0.7708, "clue_log_loss": 0.664, "log_loss": 0.0813},
    {"name": SCORE_ALONE, "top1": 0.7465, "clue_log_loss": 0.90, "log_loss": 0.1466},
    {"name": ALL_WRONG, "top1": None, "clue_log_loss": 3.1, "log_loss": 0.1629},
]
ABLATION = [
    {"name": "bm25 score only", "kind": "baseline", "top1": 0.7465, "clue_log_loss": 0.9},
    {"name": "overlap alone", "kind": "alone", "top1": 0.8090, "clue_log_loss": 0.85},
    {"name": "dense alone", "kind": "alone", "top1": 0.7465, "clue_log_loss": 0.60},
    {"name": "+ overlap", "kind": "forward", "top1": 0.99, "clue_log_loss": 0.1},
    {"name": "full model", "kind": "full", "top1": 0.7639, "clue_log_loss": 0.70},
]


def test_a_model_that_wins_every_comparison_gets_no_warning() -> None:
    assert model_losses(BASELINES, [], n_clues=288) == []


def test_each_lost_comparison_is_named_with_both_figures() -> None:
    found = model_losses(BASELINES, ABLATION, n_clues=288)
    messages = [w["message"] for w in found]
    # Like with like: the ablation's full row against each group alone (both refit), never
    # against a forward row; 0.8090 - 0.7639 of 288 clues is 13 clues.
    assert messages == [
        "the full feature set (ablation, refit on the evaluated clues) loses to 'overlap alone' "
        "on top-1 accuracy: 0.764 against 0.809 (13 fewer of 288 clues right first)",
        "the full feature set (ablation, refit on the evaluated clues) loses to 'dense alone' "
        "on clue-level log-loss: 0.700 against 0.600 (lower is better)",
    ]
    assert found[0]["model_value"] == 0.7639 and found[0]["other_value"] == 0.8090


def test_a_baseline_that_wins_is_named_and_close_figures_are_told_apart() -> None:
    worse = [dict(BASELINES[0], top1=0.7, log_loss=0.14661), *BASELINES[1:]]
    messages = [w["message"] for w in model_losses(worse, [], n_clues=288)]
    assert messages == [
        "the model loses to the baseline 'retrieval score alone' on top-1 accuracy: "
        "0.700 against 0.747 (13 fewer of 288 clues right first)",
        # 0.14661 and 0.1466 are equal at 3 and 4 decimals: 5 are shown.
        "the model loses to the baseline 'retrieval score alone' on candidate-level log-loss: "
        "0.14661 against 0.14660 (lower is better)",
    ]


def test_same_logs_and_fitting_notes() -> None:
    assert same_logs_warning("", "") is None and same_logs_warning("ab", "cd") is None
    same = same_logs_warning("ab", "ab")
    assert same is not None and "trained on" in same["message"]
    notes = fitting_notes(n_folds=5, C=1.0, version="abc123")
    assert "the saved model as trained (version abc123), not refit" in notes[MODEL]
    for key in (SCORE_ALONE, "ablation"):
        assert (
            "refit by 5-fold cross-validation grouped by clue on the evaluated clues" in notes[key]
        )
    assert "C (1)" in notes["ablation"] and "not the saved model" in notes["ablation"]
