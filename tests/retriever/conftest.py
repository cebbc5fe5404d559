"""Fixtures for the retrieval-core tests."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest


@pytest.fixture
def small_records() -> list[dict[str, Any]]:
    """A handful of invented articles with links, aliases and qualified titles."""
    return [
        {
            "id": "m1",
            "title": "Quillfen (river)",
            "text": "A slow river that winds through the Varrow "
            "marshes before joining the Tallmere estuary.",
            "links": ["Tallmere", "Varrow"],
            "aliases": ["Quill river"],
            "popularity": 12.5,
        },
        {
            "id": "m2",
            "title": "Quillfen (village)",
            "text": "A fishing village on the banks of the Quillfen river, known for reed baskets.",
            "links": ["Quillfen (river)", "reed basket"],
            "popularity": 3,
        },
        {
            "id": "m3",
            "title": "Tallmere",
            "text": "The estuary where the Quillfen meets the grey sea; "
            "ferries cross it twice a day.",
            "links": ["Quill river", "m2", "Nowhere Land"],
        },
        {
            "id": "m4",
            "title": "Varrow",
            "text": "Wide marshes of reed and peat, home to herons.",
            "links": ["tallmere"],
            "metadata": {"kind": "place"},
        },
        {
            "id": "m5",
            "title": "Reed basket",
            "text": "A basket woven from dried marsh reeds.",
            "links": ["Varrow", "Varrow"],
            "aliases": ["reed baskets"],
        },
    ]


@pytest.fixture(scope="module")
def ray_cluster() -> Iterator[None]:
    """A two-CPU Ray cluster on this machine for a module's builds, shut down after."""
    ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    yield
    ray.shutdown()
