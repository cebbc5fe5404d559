"""Deterministic generator of an invented encyclopedia and clue questions for demos and tests."""

from __future__ import annotations

from corpus_demo.pipeline import DEFAULT_DATA_DIR, generate_corpus

__all__ = ["DEFAULT_DATA_DIR", "generate_corpus"]
