"""A threshold per share of the clue revealed: which bin a share falls in, and its threshold.

Plain numbers (numpy only), stored in the model file's decision section and read by serving;
`reranker.training.schedule` tunes one on held-out prefixes.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Any

import numpy as np

_SLACK = 1e-9  # float noise on shares: 0.2 written as 0.20000000001 stays in the 0-20% bin


@dataclass(frozen=True)
class ThresholdSchedule:
    """One threshold per bin of the share of the clue revealed.

    shares are the bins' upper edges, increasing, the last 1.0: bin i holds shares in
    (shares[i-1], shares[i]]. A threshold of 1 never answers (probabilities stay below 1).
    none_abstain: on a complete clue, abstain when "none of these" is at least this.
    """

    shares: tuple[float, ...]
    thresholds: tuple[float, ...]
    none_abstain: float | None = None

    def __post_init__(self) -> None:
        s, t = self.shares, self.thresholds
        if not s or len(s) != len(t):
            raise ValueError("a schedule needs one threshold per share bin, at least one")
        if any(not 0 < v <= 1 for v in s) or any(b <= a for a, b in itertools.pairwise(s)):
            raise ValueError(f"schedule shares must increase within (0, 1], got {list(s)}")
        if s[-1] != 1.0:
            raise ValueError(f"the last schedule share must be 1 (the whole clue), got {s[-1]}")
        if any(not 0 <= v <= 1 for v in t):
            raise ValueError(f"schedule thresholds must be between 0 and 1, got {list(t)}")
        if self.none_abstain is not None and not 0 <= self.none_abstain <= 1:
            raise ValueError(f"none_abstain must be between 0 and 1, got {self.none_abstain}")

    def bin_of(self, share: Any) -> np.ndarray:
        """The bin of each share (an array of ints)."""
        i = np.searchsorted(self.shares, np.asarray(share, dtype=np.float64) - _SLACK)
        return np.minimum(i, len(self.shares) - 1)

    def per_row(self, share: Any) -> np.ndarray:
        """The threshold of each share."""
        return np.asarray(self.thresholds, dtype=np.float64)[self.bin_of(share)]

    def span(self, share: float) -> tuple[float, float, float]:
        """(threshold, bin's lower edge, bin's upper edge) for one share."""
        i = int(self.bin_of(share))
        return self.thresholds[i], (self.shares[i - 1] if i else 0.0), self.shares[i]

    def to_dict(self) -> dict[str, Any]:
        """Plain data for the model file."""
        return {
            "shares": list(self.shares),
            "thresholds": list(self.thresholds),
            "none_abstain": self.none_abstain,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ThresholdSchedule:
        """From the model file's section (checked field by field by `reranker.artifact`)."""
        none = data.get("none_abstain")
        return cls(
            tuple(float(v) for v in data["shares"]),
            tuple(float(v) for v in data["thresholds"]),
            None if none is None else float(none),
        )
