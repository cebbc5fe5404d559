"""The reranker as a scikit-learn-style estimator: grouped cross-validated fit and calibration.

`Reranker().fit(X, y, groups, feature_names)` chooses C by grouped cross-validated log-loss,
fits on all rows, then chooses and fits a calibrator on out-of-fold probabilities. What it
learns is a plain `LinearModel` (`model_`), the object that is saved and served.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.exceptions import NotFittedError
from sklearn.metrics import log_loss
from tqdm.auto import tqdm

from retriever.cluster import Runner

from ..errors import TrainingError
from ..model import LinearModel
from .blockfit import block_fitter, choose_fit
from .fitting import cross_calibrate, fit_calibrator, grouped_folds, make_pipeline_for, oof_proba

DEFAULT_CS = (0.01, 0.1, 1.0, 10.0, 100.0)
CALIBRATIONS = ("auto", "none", "platt", "isotonic")


class Reranker:
    """Logistic model of 'this candidate is the answer', fitted with folds grouped by clue.

    As in scikit-learn, `__init__` only stores its settings (they are checked by `fit`),
    `fit` returns the estimator, and what it learned ends in `_`.
    """

    def __init__(
        self,
        *,
        Cs: tuple[float, ...] = DEFAULT_CS,
        calibration: str = "auto",
        n_folds: int = 5,
        max_iter: int = 5000,
        verbose: bool = False,
        fit: str = "auto",
        block_rows: int = 65_536,
        runner: Runner | None = None,
        fit_budget: int | None = None,
    ) -> None:
        self.Cs = Cs
        self.calibration = calibration
        self.n_folds = n_folds
        self.max_iter = max_iter
        self.verbose = verbose  # a progress bar on stderr while fitting
        # 'memory': scikit-learn on the gathered table; 'blocks': the map-reduce Newton fit
        # of reranker/training/blockfit.py (the same model), over blocks of `block_rows`
        # rows, as tasks of `runner` when it has a cluster; 'auto': gathered when the table
        # (rows x features x 8 bytes) is under `fit_budget` bytes (None: a share of the memory
        # available, blockfit.default_fit_budget), else in blocks.
        self.fit_mode = fit
        self.block_rows = block_rows
        self.runner = runner
        self.fit_budget = fit_budget

    def _check_settings(self) -> None:
        if self.calibration not in CALIBRATIONS:
            raise ValueError(f"calibration must be one of {CALIBRATIONS}, got {self.calibration!r}")
        if not self.Cs or any(not c > 0 for c in self.Cs):
            raise ValueError(f"Cs must be a non-empty list of positive numbers, got {self.Cs}")
        if self.n_folds < 2:
            raise ValueError(f"n_folds must be at least 2, got {self.n_folds}")

    def fit(
        self, X: np.ndarray, y: np.ndarray, groups: np.ndarray, feature_names: list[str]
    ) -> Reranker:
        """Choose C by grouped CV log-loss, fit on all rows, then choose and fit the calibrator."""
        self._check_settings()
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
        self.fit_choice_ = choose_fit(self.fit_mode, X.shape[0], X.shape[1], self.fit_budget)
        in_blocks = self.fit_choice_.method == "blocks"
        fitter = block_fitter(self.block_rows, self.runner) if in_blocks else None
        self.fitted_in_blocks_ = in_blocks
        cv_log_loss: dict[str, float] = {}
        best: tuple[float, float, np.ndarray] | None = None
        with tqdm(
            total=len(self.Cs) * len(splits) + 1,
            desc="fitting",
            unit=" fits",
            disable=not self.verbose,
            mininterval=0.5,
        ) as bar:
            for C in self.Cs:
                bar.set_postfix_str(f"C={C:g}")
                p = oof_proba(X, y, splits, C, on_fold=bar.update, fit=fitter)
                loss = float(log_loss(y, p, labels=[0, 1]))
                cv_log_loss[repr(C)] = loss
                if best is None or loss < best[0]:
                    best = (loss, C, p)
            if best is None:
                raise TrainingError("no regularization strengths (Cs) to try")
            _, C, raw_oof = best
            bar.set_postfix_str(f"final fit, C={C:g}")
            if fitter is None:
                pipeline = make_pipeline_for(C, self.max_iter).fit(X, y)
            else:
                pipeline = fitter(X, y, C)
            bar.update()
        scaler, lr = pipeline[0], pipeline[-1]
        sign = 1.0 if lr.classes_[1] == 1 else -1.0
        methods = (
            ("none", "platt", "isotonic") if self.calibration == "auto" else (self.calibration,)
        )
        method, calibration_scores, self.oof_proba_ = cross_calibrate(
            raw_oof, y, groups, self.n_folds, methods
        )
        self.model_ = LinearModel(
            feature_names=list(feature_names),
            mean=scaler.mean_,
            scale=scaler.scale_,
            coef=sign * lr.coef_[0],
            intercept=float(sign * lr.intercept_[0]),
            calibrator=fit_calibrator(method, raw_oof, y),
            C=float(C),
            cv_log_loss=cv_log_loss,
            calibration_log_loss=calibration_scores,
        )
        self.classes_ = LinearModel.classes_
        self.C_ = float(C)
        self.cv_log_loss_ = cv_log_loss
        self.calibration_scores_ = calibration_scores
        self.feature_names_ = list(feature_names)
        return self

    def _fitted(self) -> LinearModel:
        model: LinearModel | None = getattr(self, "model_", None)
        if model is None:
            raise NotFittedError(
                "this Reranker is not fitted yet; call fit(X, y, groups, feature_names) first"
            )
        return model

    def probability(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(answer) of each row. float64, shape (n,)."""
        return self._fitted().probability(X)

    def raw_probability(self, X: np.ndarray) -> np.ndarray:
        """Uncalibrated P(answer) of each row. float64, shape (n,)."""
        return self._fitted().raw_probability(X)

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """scikit-learn style: columns [P(wrong), P(right)]."""
        return self._fitted().predict_proba(X)

    # The learned numbers live on model_; reading them before fit raises the not-fitted error.
    @property
    def coef_(self) -> np.ndarray:
        """Coefficients over the scaled features. float64, shape (n_features,)."""
        return self._fitted().coef_

    @property
    def intercept_(self) -> float:
        """Intercept of the logit."""
        return self._fitted().intercept_

    @property
    def mean_(self) -> np.ndarray:
        """Feature means of the scaler. float64, shape (n_features,)."""
        return self._fitted().mean_

    @property
    def scale_(self) -> np.ndarray:
        """Feature scales of the scaler. float64, shape (n_features,)."""
        return self._fitted().scale_

    @property
    def calibrator_(self) -> dict[str, Any]:
        """The chosen calibrator as plain data."""
        return self._fitted().calibrator_
