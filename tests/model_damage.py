"""Damaged model files for the loading and reload tests: (case, how to damage, field named)."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

Damage = Callable[[dict[str, Any]], None]


def _set(path: str, value: Any) -> Damage:
    """Set a dotted field ('decision.threshold', 'coef.0') of the artifact to value."""

    def apply(d: dict[str, Any]) -> None:
        *parents, last = path.split(".")
        node: Any = d
        for p in parents:
            node = node[int(p)] if isinstance(node, list) else node[p]
        if isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value

    return apply


def _drop(key: str) -> Damage:
    return lambda d: d.pop(key)


def _shorten(key: str) -> Damage:
    return lambda d: d.__setitem__(key, d[key][:-1])


# Each case: what is wrong, how to make it so, the field the error must name.
CASES: list[tuple[str, Damage, str]] = [
    ("nan threshold", _set("decision.threshold", float("nan")), "decision.threshold"),
    ("threshold above 1", _set("decision.threshold", 1.5), "decision.threshold"),
    ("string decision", _set("decision", "always"), "decision"),
    ("short coefficients", _shorten("coef"), "coef"),
    ("string coefficient", _set("coef.0", "high"), "coef[0]"),
    ("missing intercept", _drop("intercept"), "intercept"),
    ("negative k", _set("training.k", -3), "training.k"),
    ("boolean k", _set("training.k", True), "training.k"),
    ("zero scale", _set("scaler.scale.0", 0.0), "scaler.scale[0]"),
    ("infinite C", _set("C", float("inf")), "C"),
    ("negative penalty", _set("decision.payoff.penalty", -1.0), "decision.payoff.penalty"),
    ("number as feature name", _set("feature_names.0", 5), "feature_names"),
    ("nan in presence", _set("presence.coef.0", float("nan")), "presence.coef"),
    (
        "schedule threshold above 1",
        _set("decision.schedule.thresholds.0", 1.5),
        "decision.schedule.thresholds[0]",
    ),
    (
        "schedule shares out of order",
        _set("decision.schedule.shares.0", 1.0),
        "decision.schedule.shares[1]",
    ),
    ("reward fall above 1", _set("decision.payoff.reward_fall", 2), "decision.payoff.reward_fall"),
]


def damaged(artifact: dict[str, Any], damage: Damage) -> str:
    """The artifact with one damage, as the JSON text a file would hold (NaN written as NaN)."""
    data = json.loads(json.dumps(artifact))
    damage(data)
    return json.dumps(data)
