"""What loading a model checks field by field, and the version covering the whole artifact."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from reranker import ModelFormatError, load_model, rank_clue, read_model, save_model
from reranker.training.train import TrainResult
from tests.model_damage import CASES, Damage, damaged
from tests.reranker.conftest import REPO, World


@pytest.fixture
def artifact(world_trained: TrainResult, world_model_path: Path) -> dict[str, Any]:
    """A fresh copy of the small world's saved model as parsed JSON."""
    data: dict[str, Any] = json.loads(world_model_path.read_text(encoding="utf-8"))
    return data


@pytest.mark.parametrize(("case", "damage", "field"), CASES, ids=[c[0] for c in CASES])
def test_damaged_fields_are_refused_naming_the_field(
    artifact: dict[str, Any], tmp_path: Path, case: str, damage: Damage, field: str
) -> None:
    path = tmp_path / "m.json"
    path.write_text(damaged(artifact, damage), encoding="utf-8")
    with pytest.raises(ModelFormatError) as caught:
        load_model(path)
    message = str(caught.value)
    assert str(path) in message and field in message, message


@pytest.mark.slow
@pytest.mark.parametrize("case", ["nan threshold", "string decision", "negative k"])
def test_evaluate_refuses_a_damaged_model_in_one_line(
    world: World, artifact: dict[str, Any], tmp_path: Path, case: str
) -> None:
    _, damage, field = next(c for c in CASES if c[0] == case)
    model = tmp_path / "m.json"
    model.write_text(damaged(artifact, damage), encoding="utf-8")
    proc = subprocess.run(
        [sys.executable, "-m", "api.cli", "evaluate", "--index", str(world.index.path),
         "--log", str(world.test_log), "--model", str(model), "--report", str(tmp_path / "r")],
        capture_output=True, text=True, cwd=REPO, timeout=300,
    )  # fmt: skip
    assert proc.returncode != 0
    assert "Traceback" not in proc.stderr and field in proc.stderr and str(model) in proc.stderr
    assert not (tmp_path / "r").exists()


def test_version_covers_the_threshold_and_every_other_section(
    artifact: dict[str, Any], tmp_path: Path
) -> None:
    a, b, c = tmp_path / "a.json", tmp_path / "b.json", tmp_path / "c.json"
    a.write_text(json.dumps(artifact), encoding="utf-8")
    other = json.loads(json.dumps(artifact))
    other["decision"]["threshold"] = round(1 - artifact["decision"]["threshold"] / 2, 2)
    b.write_text(json.dumps(other), encoding="utf-8")  # the stored model_version is unchanged
    again = json.loads(json.dumps(artifact))
    again["training"]["k"] = artifact["training"]["k"] + 1
    c.write_text(json.dumps(again), encoding="utf-8")
    versions = {read_model(p).version for p in (a, b, c)}
    assert len(versions) == 3
    # The version a file states is the hash of its content: saving and reading agree.
    assert read_model(a).version == artifact["model_version"]
    # Only the description of the file (its creation time) leaves the version alone.
    stamped = dict(artifact, created_at="2001-01-01T00:00:00+00:00")
    c.write_text(json.dumps(stamped), encoding="utf-8")
    assert read_model(c).version == artifact["model_version"]


def test_saved_version_matches_a_reread(
    world_trained: TrainResult, world_model_path: Path, tmp_path: Path
) -> None:
    model = read_model(world_model_path)  # a private copy: saving sets its artifact
    written = save_model(model, tmp_path / "m.json", decision={"threshold": 0.3})
    assert read_model(tmp_path / "m.json").version == written["model_version"]
    other = save_model(model, tmp_path / "n.json", decision={"threshold": 0.4})
    assert other["model_version"] != written["model_version"]


def test_the_schedule_round_trips_and_a_file_without_one_keeps_its_single_threshold(
    world: World, world_trained: TrainResult, artifact: dict[str, Any], tmp_path: Path
) -> None:
    decision = artifact["decision"]
    served = load_model(_write(tmp_path / "with.json", artifact))
    assert served.schedule is not None
    assert served.schedule.to_dict() == decision["schedule"]
    assert served.schedule == world_trained.model.schedule
    assert decision["rules"]["schedule"]["thresholds"] == decision["schedule"]["thresholds"]
    clue = "This song is known for"
    r = rank_clue(world.index, served, clue, revealed=0.2)
    assert (r.decision.threshold, r.decision.basis) == (served.schedule.span(0.2)[0], "share")
    # An older file: no schedule, so every request gets the single threshold.
    old = {k: v for k, v in artifact.items()}
    old["decision"] = {k: v for k, v in decision.items() if k != "schedule"}
    plain = load_model(_write(tmp_path / "without.json", old))
    assert plain.schedule is None
    r = rank_clue(world.index, plain, clue, revealed=0.2)
    assert (r.decision.threshold, r.decision.basis) == (decision["threshold"], "single")


def _write(path: Path, data: dict[str, Any]) -> Path:
    path.write_text(json.dumps(data), encoding="utf-8")
    return path
