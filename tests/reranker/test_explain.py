"""Explanations: a candidate's logit taken apart, under each calibrator the model may have."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from reranker import explain_row, load_model, rank_clue
from reranker.training import train
from tests.reranker.conftest import World


@pytest.mark.parametrize("calibration", ["none", "platt", "isotonic"])
def test_explanation_rebuilds_the_served_pointwise_probability(
    world: World, tmp_path: Path, calibration: str
) -> None:
    path = tmp_path / "model.json"
    train(world.index, [world.train_log], path, calibration=calibration)
    model = load_model(path, index=world.index)
    assert model.model.calibrator_["method"] == calibration
    clues = world.train_log.read_text().splitlines()[:5]
    for raw in clues:
        r = rank_clue(world.index, model, json.loads(raw)["clue"], include_features=True)
        for c in r.candidates:
            e = explain_row(model, c.features)
            assert e.calibration == calibration
            assert e.intercept + math.fsum(p.contribution for p in e.parts) == pytest.approx(
                e.logit, abs=1e-9
            )
            assert e.pointwise == pytest.approx(c.pointwise, abs=1e-9)
            named = f"{calibration} calibrator" in e.how
            assert named == (calibration != "none")
