"""Checking a model artifact field by field, and its version: a hash of the whole content.

`check_artifact` looks at every field that serving or evaluation reads (types, finite
numbers, ranges, array lengths against the feature names) and raises `ModelFormatError`
naming the file and the field, so a damaged or hand-edited file is refused when it is
loaded, never at a request. Sections it does not know (reports, metrics, newer additions)
are left alone; they cannot change an answer.

`artifact_version` hashes the canonical JSON of the whole artifact except its own version
and creation time, so two files that can answer differently (another threshold, another
calibrator, another k) never share a version.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from typing import Any

from .errors import ModelFormatError

# Fields that describe the file rather than what it computes: left out of the version.
# `fit` says which fit ran and why, with a memory budget that by default follows the memory
# free at the time (the fitted numbers it led to are versioned as they are).
UNVERSIONED = ("model_version", "created_at", "fit")


def artifact_version(data: Mapping[str, Any]) -> str:
    """Short hash of the canonical JSON of everything in the artifact that can change an answer."""
    body = {k: v for k, v in data.items() if k not in UNVERSIONED}
    # Through JSON once first, so the hash is of what a file holds: number keys become
    # strings (and sort as strings), tuples become lists, as they do on disk.
    body = json.loads(json.dumps(body))
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:12]


class _Checker:
    """Field checks that raise one ModelFormatError naming the file and the field."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, field: str, what: str, value: Any) -> ModelFormatError:
        shown = repr(value)
        shown = shown if len(shown) <= 60 else shown[:57] + "..."
        return ModelFormatError(
            f"{self.source}: {field} must be {what}, got {shown}; "
            "retrain the model or restore the file"
        )

    def get(self, data: Mapping[str, Any], key: str, field: str, *, required: bool) -> Any:
        if key not in data:
            if required:
                raise ModelFormatError(
                    f"{self.source}: {field} is missing; retrain the model or restore the file"
                )
            return None
        return data[key]

    def obj(self, value: Any, field: str) -> Mapping[str, Any]:
        if not isinstance(value, dict):
            raise self.fail(field, "an object", value)
        return value

    def number(
        self, value: Any, field: str, *, low: float | None = None, high: float | None = None
    ) -> float:
        """A finite JSON number (not a boolean) within [low, high] where given."""
        ok = isinstance(value, int | float) and not isinstance(value, bool)
        if not ok or not math.isfinite(value):
            raise self.fail(field, "a finite number", value)
        if (low is not None and value < low) or (high is not None and value > high):
            span = f"between {low} and {high}" if low is not None and high is not None else ""
            span = span or (f"at least {low}" if low is not None else f"at most {high}")
            raise self.fail(field, f"a number {span}", value)
        return float(value)

    def positive(self, value: Any, field: str) -> float:
        v = self.number(value, field)
        if v <= 0:
            raise self.fail(field, "a number above 0", value)
        return v

    def integer(self, value: Any, field: str, *, low: int) -> int:
        if not isinstance(value, int) or isinstance(value, bool) or value < low:
            what = "a positive integer" if low == 1 else f"an integer of at least {low}"
            raise self.fail(field, what, value)
        return value

    def numbers(self, value: Any, field: str, length: int, *, positive: bool = False) -> None:
        if not isinstance(value, list):
            raise self.fail(field, f"a list of {length} numbers", value)
        if len(value) != length:
            raise self.fail(
                field, f"a list of {length} numbers (one per feature name)", f"{len(value)} items"
            )
        for i, v in enumerate(value):
            if positive:
                self.positive(v, f"{field}[{i}]")
            else:
                self.number(v, f"{field}[{i}]")

    def strings(self, value: Any, field: str, *, unique: bool = False) -> list[str]:
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            raise self.fail(field, "a list of non-empty strings", value)
        if unique and len(set(value)) != len(value):
            dup = next(v for i, v in enumerate(value) if v in value[:i])
            raise self.fail(field, "a list without repeats", f"{dup!r} twice")
        return list(value)


def check_artifact(data: Mapping[str, Any], source: str) -> None:
    """Check every field serving or evaluation reads; ModelFormatError naming the first bad one."""
    c = _Checker(source)
    given = c.get(data, "feature_names", "feature_names", required=True)
    names = c.strings(given, "feature_names", unique=True)
    n = len(names)
    if n == 0:
        raise c.fail("feature_names", "a list of at least one feature name", [])
    scaler = c.obj(c.get(data, "scaler", "scaler", required=True), "scaler")
    c.numbers(c.get(scaler, "mean", "scaler.mean", required=True), "scaler.mean", n)
    c.numbers(
        c.get(scaler, "scale", "scaler.scale", required=True), "scaler.scale", n, positive=True
    )
    c.numbers(c.get(data, "coef", "coef", required=True), "coef", n)
    c.number(c.get(data, "intercept", "intercept", required=True), "intercept")
    c.obj(c.get(data, "calibration", "calibration", required=True), "calibration")
    c.positive(c.get(data, "C", "C", required=True), "C")
    for section in ("cv_log_loss", "calibration_log_loss"):
        scores = c.get(data, section, section, required=False)
        if scores is not None:
            for key, v in c.obj(scores, section).items():
                if not isinstance(v, int | float) or isinstance(v, bool):
                    raise c.fail(f"{section}.{key}", "a number", v)
    # feature_set_version and presence are required to serve (`loading.serve` says so);
    # a bare fitted model, as `save_model` writes it alone, has neither.
    fsv = c.get(data, "feature_set_version", "feature_set_version", required=False)
    if fsv is not None:
        c.integer(fsv, "feature_set_version", low=0)
    _check_metadata(c, data.get("metadata_columns"))
    users = c.get(data, "user_features", "user_features", required=False)
    if users is not None:
        c.strings(users, "user_features")
    _check_training(c, data.get("training"))
    _check_decision(c, data.get("decision"))
    presence = c.get(data, "presence", "presence", required=False)
    if presence is not None:
        c.obj(presence, "presence")  # its numbers: PresenceModel.from_dict, field by field


def _check_metadata(c: _Checker, meta: Any) -> None:
    if meta is None:
        return
    c.obj(meta, "metadata_columns")
    numeric = meta.get("numeric", [])
    if not isinstance(numeric, list) or not all(isinstance(v, str) for v in numeric):
        raise c.fail("metadata_columns.numeric", "a list of field names", numeric)
    for key, values in c.obj(meta.get("categorical", {}), "metadata_columns.categorical").items():
        if not isinstance(values, list) or not all(isinstance(v, str) for v in values):
            raise c.fail(f"metadata_columns.categorical.{key}", "a list of strings", values)


def _check_training(c: _Checker, training: Any) -> None:
    if training is None:
        return
    c.obj(training, "training")
    if "k" in training:
        c.integer(training["k"], "training.k", low=1)
    plan = training.get("prefix_plan")
    if plan is None:
        return
    c.obj(plan, "training.prefix_plan")
    fractions = plan.get("fractions")
    if fractions is not None:
        if not isinstance(fractions, list) or not fractions:
            raise c.fail("training.prefix_plan.fractions", "a non-empty list", fractions)
        for i, f in enumerate(fractions):
            c.number(f, f"training.prefix_plan.fractions[{i}]", low=1e-12, high=1.0)
    if plan.get("every_words") is not None:
        c.integer(plan["every_words"], "training.prefix_plan.every_words", low=1)


def _check_decision(c: _Checker, decision: Any) -> None:
    if decision is None:
        return
    c.obj(decision, "decision")
    if "threshold" in decision:
        c.number(decision["threshold"], "decision.threshold", low=0.0, high=1.0)
    payoff = decision.get("payoff")
    if payoff is not None:
        c.obj(payoff, "decision.payoff")
        if "reward" in payoff:
            c.positive(payoff["reward"], "decision.payoff.reward")
        if "penalty" in payoff:
            c.number(payoff["penalty"], "decision.payoff.penalty", low=0.0)
        if "reward_fall" in payoff:
            c.number(payoff["reward_fall"], "decision.payoff.reward_fall", low=0.0, high=1.0)
        if "cost_per_word" in payoff:
            c.number(payoff["cost_per_word"], "decision.payoff.cost_per_word", low=0.0)
    if "wait_threshold" in decision:
        c.number(decision["wait_threshold"], "decision.wait_threshold", low=0.0, high=1.0)
    _check_schedule(c, decision.get("schedule"))


def _check_schedule(c: _Checker, schedule: Any) -> None:
    """decision.schedule: share bins' upper edges (increasing, the last 1), one threshold each."""
    if schedule is None:  # a model without one serves its single threshold
        return
    c.obj(schedule, "decision.schedule")
    shares = c.get(schedule, "shares", "decision.schedule.shares", required=True)
    if not isinstance(shares, list) or not shares:
        raise c.fail("decision.schedule.shares", "a non-empty list", shares)
    for i, v in enumerate(shares):
        c.number(v, f"decision.schedule.shares[{i}]", low=1e-12, high=1.0)
        if i and v <= shares[i - 1]:
            raise c.fail(f"decision.schedule.shares[{i}]", "above the share before it", v)
    if shares[-1] != 1.0:
        raise c.fail(
            f"decision.schedule.shares[{len(shares) - 1}]", "1 (the whole clue)", shares[-1]
        )
    thresholds = c.get(schedule, "thresholds", "decision.schedule.thresholds", required=True)
    if not isinstance(thresholds, list) or len(thresholds) != len(shares):
        raise c.fail(
            "decision.schedule.thresholds",
            f"a list of {len(shares)} numbers (one per share)",
            thresholds,
        )
    for i, v in enumerate(thresholds):
        c.number(v, f"decision.schedule.thresholds[{i}]", low=0.0, high=1.0)
    none = schedule.get("none_abstain")
    if none is not None:
        c.number(none, "decision.schedule.none_abstain", low=0.0, high=1.0)
