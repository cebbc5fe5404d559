"""Reranker: candidate features, calibrated logistic model, decisions and evaluation."""

from __future__ import annotations

__all__: list[str] = []
