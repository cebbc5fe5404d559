"""Exceptions raised by the reranker, all rooted in RerankerError."""

from __future__ import annotations

from retriever.errors import located


class RerankerError(Exception):
    """Base class of every error the reranker raises on purpose."""


class LabelledLogError(RerankerError):
    """Raised when a labelled or served log has a bad line; names the file, line and field."""

    def __init__(self, message: str, *, file: str = "", line: int = 0, field: str = "") -> None:
        self.file, self.line, self.field, self.reason = file, line, field, message
        super().__init__(located(message, file, line, field))


class FeatureError(RerankerError):
    """Raised when a feature is unknown, cannot be imported, or returns a bad array."""


class ModelFormatError(RerankerError):
    """Raised when a model file is missing, not JSON, or not a known hunchwise model version."""


class ModelMismatchError(RerankerError):
    """Raised when a model's features do not match the features the running code provides."""


class TrainingError(RerankerError):
    """Raised when the data cannot train a model (e.g. no positive examples)."""
