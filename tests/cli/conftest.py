"""Fixtures for the command-line tests: the small invented world and the retriever's records."""

from __future__ import annotations

import pytest

from tests.reranker.conftest import World, make_world
from tests.retriever.conftest import small_records

__all__ = ["small_records"]  # a fixture, shared with the retriever tests


@pytest.fixture(scope="session")
def world(tmp_path_factory: pytest.TempPathFactory) -> World:
    """The small invented world."""
    return make_world(tmp_path_factory.mktemp("world"))
