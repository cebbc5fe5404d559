"""The fitted logistic model and its JSON artifact: read, write, probabilities (numpy only).

This module owns the model file format: `save_model` writes it and `read_model` reads it.
Fitting lives in `reranker.training`, so serving never imports scikit-learn.
"""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from scipy.special import expit

from retriever import atomicfile

from .artifact import artifact_version, check_artifact
from .errors import ModelFormatError

FORMAT_NAME = "hunchwise-model"
FORMAT_VERSION = 2  # 2: the presence section (one distribution per clue)
_EPS = 1e-6  # keep calibrated probabilities off 0 and 1 so log-loss stays finite


def logit(p: np.ndarray) -> np.ndarray:
    """log(p / (1 - p)), with p kept a little off 0 and 1."""
    p = np.clip(p, _EPS, 1 - _EPS)
    return np.log(p / (1 - p))


def apply_calibrator(cal: dict[str, Any], p: np.ndarray) -> np.ndarray:
    """Apply a calibrator written by fit_calibrator (numpy only)."""
    method = cal.get("method", "none")
    if method == "platt":
        z = cal["a"] * logit(p) + cal["b"]
        return np.clip(expit(z), _EPS, 1 - _EPS)
    if method == "isotonic":
        return np.clip(np.interp(p, np.asarray(cal["x"]), np.asarray(cal["y"])), _EPS, 1 - _EPS)
    return p


def _check_calibrator(cal: dict[str, Any], source: str) -> None:
    """Reject a calibrator that would fail or give nonsense at serving time."""
    method = cal.get("method")
    if method not in ("none", "platt", "isotonic"):
        raise ModelFormatError(
            f"{source}: calibration.method must be none, platt or isotonic, got {method!r}; "
            "retrain the model"
        )
    bad = False
    if method == "platt":
        bad = not all(
            isinstance(cal.get(k), int | float) and math.isfinite(cal[k]) for k in ("a", "b")
        )
    elif method == "isotonic":
        try:
            x = np.asarray(cal.get("x"), dtype=np.float64)
            y = np.asarray(cal.get("y"), dtype=np.float64)
        except (TypeError, ValueError):
            bad = True
        else:
            bad = (
                x.ndim != 1
                or x.shape != y.shape
                or x.size == 0
                or not np.all(np.isfinite(x) & np.isfinite(y))
                or bool(np.any(np.diff(x) < 0))
            )
    if bad:
        raise ModelFormatError(f"{source}: the {method} calibrator is damaged; retrain the model")


class LinearModel:
    """A fitted logistic model as plain numbers: scaler, coefficients, calibrator (numpy only).

    What serving needs and nothing more: it cannot be fitted (that is
    `reranker.training.Reranker`), and it knows nothing of features or thresholds (that is
    the served model from `load_model`). Attributes end in `_` because they were learned.
    """

    classes_ = np.array([0, 1])  # column order of predict_proba, as in scikit-learn

    def __init__(
        self,
        *,
        feature_names: list[str],
        mean: np.ndarray,
        scale: np.ndarray,
        coef: np.ndarray,
        intercept: float,
        calibrator: dict[str, Any],
        C: float,
        cv_log_loss: dict[str, float] | None = None,
        calibration_log_loss: dict[str, float] | None = None,
        artifact: dict[str, Any] | None = None,
    ) -> None:
        self.feature_names_ = list(feature_names)
        self.mean_ = np.asarray(mean, dtype=np.float64)
        self.scale_ = np.asarray(scale, dtype=np.float64)
        self.coef_ = np.asarray(coef, dtype=np.float64)
        self.intercept_ = float(intercept)
        self.calibrator_ = dict(calibrator)
        self.C_ = float(C)
        self.cv_log_loss_ = dict(cv_log_loss or {})
        self.calibration_scores_ = dict(calibration_log_loss or {})
        self.artifact_: dict[str, Any] = artifact or {}

    def raw_probability(self, X: np.ndarray) -> np.ndarray:
        """Uncalibrated P(answer) from the stored numbers (numpy only). float64, shape (n,)."""
        weights, offset = self._linear()
        # (X - mean) / scale @ coef + intercept, folded into X @ weights + offset: the same
        # number up to float rounding (~1e-15), in two array operations instead of four.
        z = np.asarray(np.asarray(X, dtype=np.float64) @ weights)  # an array even for one row
        z += offset
        # expit, as scikit-learn's predict_proba uses: 1 / (1 + exp(-z)) overflows for z < -709.
        return np.asarray(expit(z, out=z), dtype=np.float64)

    def _linear(self) -> tuple[np.ndarray, float]:
        """coef / scale and the matching intercept, recomputed if the stored numbers change."""
        c = getattr(self, "_linear_cache", None)
        if (
            c is None
            or c[0] is not self.mean_
            or c[1] is not self.scale_
            or c[2] is not self.coef_
            or c[3] is not self.intercept_
        ):
            weights = self.coef_ / self.scale_
            offset = self.intercept_ - float(self.mean_ @ weights)
            c = (self.mean_, self.scale_, self.coef_, self.intercept_, weights, offset)
            self._linear_cache = c
        return c[4], c[5]

    def probability(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(answer) of each row. float64, shape (n,)."""
        cal = self.calibrator_
        if cal.get("method") == "isotonic":  # the thresholds as arrays, converted once
            cached = getattr(self, "_isotonic_cache", None)
            if cached is None or cached[0] is not cal:
                xs = np.asarray(cal["x"], dtype=np.float64)
                cached = self._isotonic_cache = (cal, xs, np.asarray(cal["y"], dtype=np.float64))
            p = np.interp(self.raw_probability(X), cached[1], cached[2])
            return np.clip(p, _EPS, 1 - _EPS)
        return apply_calibrator(cal, self.raw_probability(X))

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """scikit-learn style: columns [P(wrong), P(right)]."""
        p = self.probability(X)
        return np.column_stack([1 - p, p])

    # -- artifact ---------------------------------------------------------------
    def to_dict(self, **extra: Any) -> dict[str, Any]:
        """The model as plain JSON data; `extra` adds sections such as metrics or decision."""
        body = {
            "feature_names": self.feature_names_,
            "scaler": {"mean": self.mean_.tolist(), "scale": self.scale_.tolist()},
            "coef": self.coef_.tolist(),
            "intercept": self.intercept_,
            "calibration": self.calibrator_,
            "C": self.C_,
            "cv_log_loss": self.cv_log_loss_,
            "calibration_log_loss": self.calibration_scores_,
        }
        data: dict[str, Any] = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "model_version": "",
            "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
            **body,
            **extra,
        }
        # The version covers the whole artifact (threshold, presence, k, ...), not only the
        # fitted numbers: two files that can answer differently never share a version.
        data["model_version"] = artifact_version(data)
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any], *, source: str = "<model>") -> LinearModel:
        """Rebuild a fitted model from its plain-data form, checking the format."""
        if not isinstance(data, dict) or data.get("format") != FORMAT_NAME:
            raise ModelFormatError(f"{source}: not a hunchwise model file")
        if data.get("format_version") != FORMAT_VERSION:
            raise ModelFormatError(
                f"{source}: model format version {data.get('format_version')} is not supported "
                f"(this hunchwise reads {FORMAT_VERSION}); retrain with 'hunchwise train'"
            )
        check_artifact(data, source)
        # The version is the content's hash, whatever the file says: a file edited by hand
        # (another threshold, say) must not pass for the model it was copied from.
        data = {**data, "model_version": artifact_version(data)}
        try:
            m = cls(
                feature_names=[str(n) for n in data["feature_names"]],
                mean=np.asarray(data["scaler"]["mean"], dtype=np.float64),
                scale=np.asarray(data["scaler"]["scale"], dtype=np.float64),
                coef=np.asarray(data["coef"], dtype=np.float64),
                intercept=float(data["intercept"]),
                calibrator=dict(data["calibration"]),
                C=float(data["C"]),
                cv_log_loss=dict(data.get("cv_log_loss", {})),
                calibration_log_loss=dict(data.get("calibration_log_loss", {})),
                artifact=data,
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelFormatError(
                f"{source}: the model file is incomplete or damaged ({exc!r}); retrain it"
            ) from exc
        n = len(m.feature_names_)
        if not (m.mean_.shape == m.scale_.shape == m.coef_.shape == (n,)) or not all(
            math.isfinite(v) for v in [m.intercept_, *m.coef_.tolist(), *m.mean_.tolist()]
        ):
            raise ModelFormatError(
                f"{source}: coefficient arrays do not match the {n} feature names; retrain it"
            )
        if not np.all(np.isfinite(m.scale_) & (m.scale_ > 0)):
            raise ModelFormatError(f"{source}: scaler scales must be positive numbers; retrain it")
        _check_calibrator(m.calibrator_, source)
        return m

    @property
    def version(self) -> str:
        """Short id of the artifact (set once saved or loaded)."""
        return str(self.artifact_.get("model_version", "unsaved"))


def save_model(model: LinearModel, path: str | Path, **extra: Any) -> dict[str, Any]:
    """Write the model JSON atomically (temp file + rename); returns what was written."""
    data = model.to_dict(**extra)
    atomicfile.write_text(path, json.dumps(data, indent=1))
    model.artifact_ = data
    return data


def read_model(path: str | Path) -> LinearModel:
    """Read a model JSON file (no code runs; only numbers and names are read)."""
    path = Path(path)
    if not path.exists():
        raise ModelFormatError(f"{path}: no such model file; train one with 'hunchwise train'")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ModelFormatError(f"{path}: cannot read the model file ({exc})") from exc
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelFormatError(
            f"{path}: not valid JSON ({exc}); retrain or restore the model file"
        ) from exc
    return LinearModel.from_dict(data, source=str(path))
