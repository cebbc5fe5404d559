"""The logistic reranker: grouped cross-validated fit, optional calibration, JSON artifact."""

from __future__ import annotations

import hashlib
import json
import math
import os
import uuid
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from scipy.special import expit

from .errors import ModelFormatError, TrainingError

FORMAT_NAME = "hunchwise-model"
FORMAT_VERSION = 1
DEFAULT_CS = (0.01, 0.1, 1.0, 10.0, 100.0)
CALIBRATIONS = ("auto", "none", "platt", "isotonic")
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


class Reranker:
    """Logistic model of 'this candidate is the answer'; scaler and calibrator as plain data."""

    # Set by load_model when the model is prepared for serving.
    artifact_: dict[str, Any]
    registry_: Any
    code_features_: list[str]
    metadata_: Any
    threshold_: float

    def __init__(
        self,
        *,
        Cs: tuple[float, ...] = DEFAULT_CS,
        calibration: str = "auto",
        n_folds: int = 5,
        max_iter: int = 5000,
    ) -> None:
        if calibration not in CALIBRATIONS:
            raise ValueError(f"calibration must be one of {CALIBRATIONS}, got {calibration!r}")
        if not Cs or any(not c > 0 for c in Cs):
            raise ValueError(f"Cs must be a non-empty list of positive numbers, got {Cs}")
        self.Cs = tuple(Cs)
        self.calibration = calibration
        self.n_folds = n_folds
        self.max_iter = max_iter

    def fit(
        self, X: np.ndarray, y: np.ndarray, groups: np.ndarray, feature_names: list[str]
    ) -> Reranker:
        """Choose C by grouped CV log-loss, fit on all rows, then choose and fit the calibrator."""
        # Imported here, not at the top: serving loads models without scikit-learn.
        from sklearn.metrics import log_loss

        from .training.fitting import (
            cross_calibrate,
            fit_calibrator,
            grouped_folds,
            make_pipeline_for,
            oof_proba,
        )

        X, y = np.asarray(X, dtype=np.float64), np.asarray(y).astype(np.int64)
        if X.ndim != 2 or X.shape[1] != len(feature_names):
            raise ValueError(
                f"X has shape {X.shape} but {len(feature_names)} feature names were given"
            )
        if y.sum() == 0 or y.sum() == len(y):
            raise TrainingError(
                "training needs both right and wrong candidates; "
                "check that gold answers resolve and appear among the candidates"
            )
        splits = grouped_folds(y, groups, self.n_folds)
        self.cv_log_loss_: dict[str, float] = {}
        best: tuple[float, float, np.ndarray] | None = None
        for C in self.Cs:
            p = oof_proba(X, y, splits, C)
            loss = float(log_loss(y, p, labels=[0, 1]))
            self.cv_log_loss_[repr(C)] = loss
            if best is None or loss < best[0]:
                best = (loss, C, p)
        if best is None:
            raise TrainingError("no regularization strengths (Cs) to try")
        _, self.C_, raw_oof = best
        self.pipeline_ = make_pipeline_for(self.C_, self.max_iter).fit(X, y)
        scaler, lr = self.pipeline_[0], self.pipeline_[-1]
        sign = 1.0 if lr.classes_[1] == 1 else -1.0
        self.feature_names_ = list(feature_names)
        self.mean_ = scaler.mean_.astype(np.float64)
        self.scale_ = scaler.scale_.astype(np.float64)
        self.coef_ = sign * lr.coef_[0].astype(np.float64)
        self.intercept_ = float(sign * lr.intercept_[0])
        methods = (
            ("none", "platt", "isotonic") if self.calibration == "auto" else (self.calibration,)
        )
        method, self.calibration_scores_, self.oof_proba_ = cross_calibrate(
            raw_oof, y, groups, self.n_folds, methods
        )
        self.calibrator_ = fit_calibrator(method, raw_oof, y)
        return self

    def bind(
        self, registry: Any, code_features: list[str], metadata: Any, threshold: float
    ) -> Reranker:
        """Attach what serving needs: the features to compute, metadata columns, the threshold."""
        self.registry_ = registry
        self.code_features_ = list(code_features)
        self.metadata_ = metadata
        self.threshold_ = float(threshold)
        return self

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
        version = hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()[:12]
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "model_version": version,
            "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
            **body,
            **extra,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any], *, source: str = "<model>") -> Reranker:
        """Rebuild a fitted model from its plain-data form, checking the format."""
        if not isinstance(data, dict) or data.get("format") != FORMAT_NAME:
            raise ModelFormatError(f"{source}: not a hunchwise model file")
        if data.get("format_version") != FORMAT_VERSION:
            raise ModelFormatError(
                f"{source}: model format version {data.get('format_version')} is not supported "
                f"(this hunchwise reads {FORMAT_VERSION}); retrain with 'hunchwise train'"
            )
        try:
            m = cls(
                calibration=data["calibration"]["method"]
                if data["calibration"]["method"] != "none"
                else "none"
            )
            m.feature_names_ = [str(n) for n in data["feature_names"]]
            m.mean_ = np.asarray(data["scaler"]["mean"], dtype=np.float64)
            m.scale_ = np.asarray(data["scaler"]["scale"], dtype=np.float64)
            m.coef_ = np.asarray(data["coef"], dtype=np.float64)
            m.intercept_ = float(data["intercept"])
            m.calibrator_ = dict(data["calibration"])
            m.C_ = float(data["C"])
            m.cv_log_loss_ = dict(data.get("cv_log_loss", {}))
            m.calibration_scores_ = dict(data.get("calibration_log_loss", {}))
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
        m.artifact_ = data
        return m

    @property
    def version(self) -> str:
        """Short id of the artifact (set once saved or loaded)."""
        return str(getattr(self, "artifact_", {}).get("model_version", "unsaved"))


def save_model(model: Reranker, path: str | Path, **extra: Any) -> dict[str, Any]:
    """Write the model JSON atomically (temp file + rename); returns what was written."""
    data = model.to_dict(**extra)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=1)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    model.artifact_ = data
    return data


def read_model(path: str | Path) -> Reranker:
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
    return Reranker.from_dict(data, source=str(path))
