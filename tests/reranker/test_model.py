"""The logistic reranker against scikit-learn, its JSON artifact, and what loading refuses."""

from __future__ import annotations

import json
import pickle
import subprocess
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.special import expit, logit
from sklearn.exceptions import ConvergenceWarning, NotFittedError
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from sklearn.model_selection import GroupKFold, cross_val_predict
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from reranker import (
    ModelFormatError,
    ModelMismatchError,
    TrainingError,
    load_model,
    read_model,
    save_model,
)
from reranker.model import FORMAT_VERSION, apply_calibrator
from reranker.training.estimator import Reranker
from reranker.training.fitting import fit_calibrator, grouped_folds
from reranker.training.table import TrainingTable
from reranker.training.train import TrainResult
from tests.reranker.conftest import REPO, World

EPS = 1e-6  # the model keeps calibrated probabilities within [EPS, 1 - EPS]


def reference_pipeline(C: float) -> Pipeline:
    """scikit-learn's Pipeline(StandardScaler, LogisticRegression), built here independently."""
    return make_pipeline(
        StandardScaler(),
        LogisticRegression(C=C, solver="newton-cholesky", tol=1e-6, max_iter=5000),
    )


def reference_oof(table: TrainingTable, C: float) -> np.ndarray:
    """Out-of-fold P(right) from scikit-learn's cross_val_predict with GroupKFold by clue."""
    return cross_val_predict(
        reference_pipeline(C),
        table.X,
        table.y,
        groups=table.clue_id,
        cv=GroupKFold(n_splits=5),
        method="predict_proba",
    )[:, 1]


@pytest.fixture(scope="module")
def table(world_trained: TrainResult) -> TrainingTable:
    """The small world's training table."""
    return world_trained.table


@pytest.fixture(scope="module")
def plain(table: TrainingTable) -> Reranker:
    """An uncalibrated model choosing between two C values."""
    return Reranker(Cs=(0.01, 1.0), calibration="none").fit(
        table.X, table.y, table.clue_id, table.feature_names
    )


def test_probabilities_equal_sklearn_pipeline(plain: Reranker, table: TrainingTable) -> None:
    # Reference: scikit-learn Pipeline(StandardScaler, LogisticRegression).predict_proba.
    ref = reference_pipeline(plain.C_).fit(table.X, table.y).predict_proba(table.X)[:, 1]
    assert np.max(np.abs(plain.probability(table.X) - ref)) <= 1e-9
    np.testing.assert_allclose(plain.predict_proba(table.X).sum(axis=1), 1.0)


def test_probability_is_the_standardized_logistic_formula(
    plain: Reranker, table: TrainingTable
) -> None:
    # The stored numbers as the artifact describes them: expit(((X - mean) / scale) @ coef + b).
    # Serving folds scale into the weights, which may only change the last bits.
    z = ((table.X - plain.mean_) / plain.scale_) @ plain.coef_ + plain.intercept_
    np.testing.assert_allclose(plain.raw_probability(table.X), expit(z), rtol=1e-12, atol=1e-15)


def test_save_and_load_give_identical_probabilities(
    plain: Reranker, table: TrainingTable, tmp_path: Path
) -> None:
    path = tmp_path / "sub" / "model.json"
    written = save_model(plain.model_, path, note="hello")
    loaded = read_model(path)
    np.testing.assert_array_equal(loaded.probability(table.X), plain.probability(table.X))
    assert loaded.feature_names_ == table.feature_names
    assert loaded.version == written["model_version"] == plain.model_.version != "unsaved"
    assert json.loads(path.read_text())["note"] == "hello"
    assert [p.name for p in path.parent.iterdir()] == ["model.json"]  # no temp file left


def test_c_is_chosen_by_grouped_cv_log_loss(plain: Reranker, table: TrainingTable) -> None:
    # Reference: scikit-learn log_loss of cross_val_predict(GroupKFold by clue) for each C.
    for C in (0.01, 1.0):
        ref = log_loss(table.y, reference_oof(table, C))
        assert plain.cv_log_loss_[repr(C)] == pytest.approx(ref, rel=1e-9)
    assert min((0.01, 1.0), key=lambda c: plain.cv_log_loss_[repr(c)]) == plain.C_
    np.testing.assert_allclose(plain.oof_proba_, reference_oof(table, plain.C_), atol=1e-9)


def test_folds_split_by_clue_never_by_row(table: TrainingTable) -> None:
    splits = grouped_folds(table.y, table.clue_id, 5)
    assert len(splits) == 5
    seen = np.zeros(table.y.size, dtype=int)
    for train, test in splits:
        assert not set(table.clue_id[train].tolist()) & set(table.clue_id[test].tolist())
        seen[test] += 1
    assert np.all(seen == 1)  # every row is held out exactly once
    # scikit-learn's GroupKFold gives these very folds.
    ref = list(GroupKFold(n_splits=5).split(table.X, table.y, table.clue_id))
    for (a, b), (c, d) in zip(splits, ref, strict=True):
        np.testing.assert_array_equal(a, c)
        np.testing.assert_array_equal(b, d)


def test_training_refuses_data_without_both_labels() -> None:
    X = np.arange(20, dtype=float).reshape(10, 2)
    groups = np.repeat(np.arange(5), 2)
    with pytest.raises(TrainingError, match="both right and wrong"):
        Reranker().fit(X, np.zeros(10), groups, ["a", "b"])
    with pytest.raises(TrainingError, match="two clues"):
        Reranker().fit(X, np.tile([0, 1], 5), np.zeros(10, dtype=int), ["a", "b"])
    with pytest.raises(ValueError, match="feature names"):
        Reranker().fit(X, np.tile([0, 1], 5), groups, ["a"])
    # As in scikit-learn, settings are stored by __init__ and checked by fit.
    with pytest.raises(ValueError, match="calibration"):
        Reranker(calibration="magic").fit(X, np.tile([0, 1], 5), groups, ["a", "b"])
    with pytest.raises(ValueError, match="Cs"):
        Reranker(Cs=(0.0,)).fit(X, np.tile([0, 1], 5), groups, ["a", "b"])


def test_an_unfitted_reranker_says_so() -> None:
    # scikit-learn's convention: NotFittedError (a ValueError and an AttributeError).
    with pytest.raises(NotFittedError, match="not fitted"):
        Reranker().probability(np.zeros((1, 2)))
    with pytest.raises(NotFittedError):
        _ = Reranker().coef_
    assert not hasattr(Reranker(), "coef_")


def test_no_convergence_warnings_and_extreme_rows(table: TrainingTable) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # ConvergenceWarning included
        m = Reranker(calibration="auto").fit(table.X, table.y, table.clue_id, table.feature_names)
        # Rows far outside the training data: probabilities still in [0, 1], no overflow.
        far = np.vstack([table.X[:5] * 1e6, -table.X[:5] * 1e6])
        p = m.raw_probability(far)
    assert issubclass(ConvergenceWarning, Warning)
    assert np.all((p >= 0) & (p <= 1))
    # Reference: scikit-learn predict_proba on the same rows.
    ref = reference_pipeline(m.C_).fit(table.X, table.y).predict_proba(far)[:, 1]
    assert np.max(np.abs(p - ref)) <= 1e-9
    assert m.calibrator_["method"] == min(
        m.calibration_scores_, key=lambda k: (m.calibration_scores_[k], k != "none")
    )


# -- calibration -----------------------------------------------------------------------------
def _synthetic(seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.01, 0.99, 3000)
    y = (rng.random(3000) < p**2).astype(int)  # overconfident forecasts
    return p, y


def test_isotonic_calibrator_reproduces_sklearn() -> None:
    # Reference: scikit-learn IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").
    p, y = _synthetic(1)
    cal = fit_calibrator("isotonic", p, y)
    iso = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip").fit(p, y)
    new = np.r_[np.linspace(0, 1, 501), p[:100]]
    expected = np.clip(iso.predict(new), EPS, 1 - EPS)
    np.testing.assert_allclose(apply_calibrator(cal, new), expected, rtol=0, atol=1e-12)


def test_platt_calibrator_reproduces_logistic_mapping() -> None:
    # Platt scaling: P = 1 / (1 + exp(-(a * logit(p) + b))), (a, b) fit by maximum likelihood.
    # Reference: scikit-learn LogisticRegression without penalty (C=inf, lbfgs) on logit(p).
    p, y = _synthetic(2)
    cal = fit_calibrator("platt", p, y)
    ref = LogisticRegression(C=np.inf, solver="lbfgs", tol=1e-10, max_iter=1000)
    ref.fit(logit(p)[:, None], y)
    assert cal["a"] == pytest.approx(ref.coef_[0, 0], rel=1e-4)
    assert cal["b"] == pytest.approx(ref.intercept_[0], rel=1e-4, abs=1e-4)
    new = np.linspace(0.001, 0.999, 200)
    np.testing.assert_allclose(
        apply_calibrator(cal, new), ref.predict_proba(logit(new)[:, None])[:, 1], atol=1e-5
    )


@pytest.mark.parametrize("method", ["platt", "isotonic"])
def test_stored_calibrator_is_fit_on_out_of_fold_probabilities(
    table: TrainingTable, tmp_path: Path, method: str
) -> None:
    m = Reranker(Cs=(1.0,), calibration=method).fit(
        table.X, table.y, table.clue_id, table.feature_names
    )
    assert m.calibrator_["method"] == method
    raw = reference_oof(table, 1.0)  # reference: cross_val_predict with GroupKFold by clue
    if method == "isotonic":
        iso = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip").fit(raw, table.y)
        expected = np.clip(iso.predict(raw), EPS, 1 - EPS)
    else:
        lr = LogisticRegression(C=np.inf, tol=1e-10, max_iter=1000)
        z = logit(np.clip(raw, EPS, 1 - EPS))[:, None]
        expected = lr.fit(z, table.y).predict_proba(z)[:, 1]
    np.testing.assert_allclose(apply_calibrator(m.calibrator_, raw), expected, atol=1e-5)
    # The held-out probabilities used to tune the threshold are cross-fitted: each fold is
    # calibrated by a calibrator that never saw it.
    folds = GroupKFold(n_splits=5).split(table.X, table.y, table.clue_id)
    crossed = np.zeros_like(raw)
    for train, test in folds:
        crossed[test] = apply_calibrator(
            fit_calibrator(method, raw[train], table.y[train]), raw[test]
        )
    np.testing.assert_allclose(m.oof_proba_, crossed, atol=1e-9)
    # Serving applies the same calibrator to the fitted pipeline's probabilities.
    fitted = reference_pipeline(1.0).fit(table.X, table.y).predict_proba(table.X)[:, 1]
    np.testing.assert_allclose(
        m.probability(table.X), apply_calibrator(m.calibrator_, fitted), atol=1e-9
    )
    save_model(m.model_, tmp_path / "m.json")
    np.testing.assert_array_equal(
        read_model(tmp_path / "m.json").probability(table.X), m.probability(table.X)
    )


# -- what loading refuses ----------------------------------------------------------------------
@pytest.fixture
def artifact(world_trained: TrainResult, world_model_path: Path) -> dict[str, Any]:
    """A fresh copy of the small world's saved model as parsed JSON."""
    data: dict[str, Any] = json.loads(world_model_path.read_text(encoding="utf-8"))
    assert data == json.loads(json.dumps(world_trained.artifact))
    return data


def _write(path: Path, data: Any) -> Path:
    path.write_text(json.dumps(data), encoding="utf-8")
    return path


def test_model_file_is_plain_json(world_model_path: Path, artifact: dict[str, Any]) -> None:
    raw = world_model_path.read_bytes()
    assert not raw.startswith(b"\x80")  # the pickle protocol 2+ opcode
    assert artifact["format"] == "hunchwise-model"
    assert artifact["format_version"] == FORMAT_VERSION == 2
    numbers = artifact["coef"] + artifact["scaler"]["mean"] + artifact["scaler"]["scale"]
    assert all(isinstance(v, float) for v in numbers)
    assert len(artifact["coef"]) == len(artifact["feature_names"])


def test_loading_a_pickle_runs_no_code(tmp_path: Path) -> None:
    sentinel = tmp_path / "ran.txt"

    class Payload:
        def __reduce__(self) -> tuple[Any, ...]:
            return (Path.write_text, (sentinel, "code ran"))

    bad = tmp_path / "model.json"
    bad.write_bytes(pickle.dumps(Payload()))
    with pytest.raises(ModelFormatError, match="not valid JSON"):
        read_model(bad)
    assert not sentinel.exists()


def test_loading_never_imports_what_the_artifact_names(
    artifact: dict[str, Any], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    sentinel = tmp_path / "imported.txt"
    (tmp_path / "sneaky_features.py").write_text(
        f"from pathlib import Path\nPath({str(sentinel)!r}).write_text('x')\n"
        "def f(cs):\n    return cs.scores\n"
    )
    monkeypatch.syspath_prepend(str(tmp_path))
    artifact["user_features"] = ["sneaky_features:f"]
    artifact["feature_names"][0] = "user:f"
    with pytest.raises(ModelMismatchError, match="user:f"):
        load_model(_write(tmp_path / "m.json", artifact))
    assert not sentinel.exists() and "sneaky_features" not in sys.modules


def test_serving_a_model_imports_neither_scikit_learn_nor_pandas(
    world: World, world_trained: TrainResult, world_model_path: Path
) -> None:
    # "Loading needs only numpy": a fresh process imports the service, loads the model and
    # ranks a clue, and scikit-learn and pandas (which fitting and reports use) stay unloaded.
    script = (
        "import sys\n"
        "import api.app\n"
        "from reranker import load_model, rank_clue\n"
        "from retriever import load_index\n"
        f"index = load_index({str(world.index.path)!r})\n"
        f"model = load_model({str(world_model_path)!r}, index=index)\n"
        "ranking = rank_clue(index, model, 'stone bridge over the river', k=5)\n"
        "assert ranking.candidates, 'no candidates'\n"
        "print(sorted(m for m in ('sklearn', 'pandas', 'matplotlib') if m in sys.modules))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, check=False, cwd=REPO
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_missing_features_give_model_mismatch(
    artifact: dict[str, Any], tmp_path: Path, world: World
) -> None:
    artifact["feature_names"][3] = "feature_from_the_future"
    artifact["feature_names"][5] = "another_one"
    with pytest.raises(ModelMismatchError) as err:
        load_model(_write(tmp_path / "m.json", artifact), index=world.index)
    assert "feature_from_the_future" in str(err.value) and "another_one" in str(err.value)


def test_feature_set_version_and_metadata_mismatch(
    artifact: dict[str, Any], tmp_path: Path
) -> None:
    old = dict(artifact, feature_set_version=0)
    with pytest.raises(ModelMismatchError, match="feature set version 0"):
        load_model(_write(tmp_path / "a.json", old))
    meta = json.loads(json.dumps(artifact))
    meta["feature_names"][-1] = "meta:colour=red"
    with pytest.raises(ModelMismatchError, match="meta:colour=red"):
        load_model(_write(tmp_path / "b.json", meta))


def _damage(data: dict[str, Any], how: str) -> Any:
    d = json.loads(json.dumps(data))
    if how == "short coef":
        d["coef"] = d["coef"][:-1]
    elif how == "nan coef":
        d["coef"][0] = float("nan")
    elif how == "zero scale":
        d["scaler"]["scale"][0] = 0.0
    elif how == "no intercept":
        del d["intercept"]
    elif how == "platt without a":
        d["calibration"] = {"method": "platt", "b": 0.1}
    elif how == "isotonic lengths":
        d["calibration"] = {"method": "isotonic", "x": [0.0, 0.5, 1.0], "y": [0.0, 1.0]}
    elif how == "unknown calibration":
        d["calibration"] = {"method": "voodoo"}
    return d


@pytest.mark.parametrize(
    "how",
    [
        "short coef",
        "nan coef",
        "zero scale",
        "no intercept",
        "platt without a",
        "isotonic lengths",
        "unknown calibration",
    ],
)
def test_damaged_models_give_format_errors(
    artifact: dict[str, Any], tmp_path: Path, how: str
) -> None:
    with pytest.raises(ModelFormatError, match=str(tmp_path / "m.json")):
        read_model(_write(tmp_path / "m.json", _damage(artifact, how)))


def test_not_a_model_wrong_version_corrupt_missing(
    world_model_path: Path, artifact: dict[str, Any], tmp_path: Path
) -> None:
    with pytest.raises(ModelFormatError, match="not a hunchwise model"):
        read_model(_write(tmp_path / "a.json", {"hello": 1}))
    with pytest.raises(ModelFormatError, match="not a hunchwise model"):
        read_model(_write(tmp_path / "b.json", [1, 2, 3]))
    with pytest.raises(ModelFormatError, match="version 99 is not supported"):
        read_model(_write(tmp_path / "c.json", dict(artifact, format_version=99)))
    half = world_model_path.read_bytes()[: world_model_path.stat().st_size // 2]
    (tmp_path / "d.json").write_bytes(half)
    with pytest.raises(ModelFormatError, match="not valid JSON"):
        read_model(tmp_path / "d.json")
    (tmp_path / "e.json").write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(ModelFormatError, match="not valid JSON"):
        read_model(tmp_path / "e.json")
    with pytest.raises(ModelFormatError, match="no such model file"):
        read_model(tmp_path / "missing.json")
    (tmp_path / "dir.json").mkdir()
    with pytest.raises(ModelFormatError, match="cannot read"):
        read_model(tmp_path / "dir.json")
