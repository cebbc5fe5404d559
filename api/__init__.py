"""HTTP service and command line around the retriever and the reranker."""

from __future__ import annotations

__all__: list[str] = []
