"""Pass 1 of a sharded build on a cluster is a Ray Data job: the build's record, taken from the
driver's own dataset statistics, shows it; without a cluster it runs in this process."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from retriever.sharded import read_manifest
from retriever.shards import build_sharded

from .helpers import write_jsonl

pytestmark = pytest.mark.slow

WORDS = ["amber", "basalt", "cinder", "dune", "ember", "fjord", "glacier", "heath", "isle"]


def _records(n: int = 30) -> list[dict[str, Any]]:
    """Invented articles, each with three of the words."""
    return [
        {
            "id": f"a{i}",
            "title": f"Place {i}",
            "text": " ".join(WORDS[(i + j * 2) % len(WORDS)] for j in range(3)),
        }
        for i in range(n)
    ]


def test_pass_one_runs_as_a_ray_data_job(ray_cluster: None, tmp_path: Path) -> None:
    corpus = write_jsonl(tmp_path / "places.jsonl", _records())
    out = build_sharded(corpus, tmp_path / "idx", shards=3, ray_address="local", vectors=False)
    record = read_manifest(out)["build"]["pass1"]
    assert record["engine"] == "ray data"
    # The operators of the job as the driver's Dataset.stats() lists them: the three ranges
    # read as items, then counted by the CountRanges workers, one block of counts per range.
    ops = record["operators"]
    assert any("FromItems" in op for op in ops), ops
    counting = [op for op in ops if "MapBatches(CountRanges)" in op]
    assert len(counting) == 1, ops
    blocks = re.search(r"(\d+) blocks produced", counting[0])
    assert blocks is not None and int(blocks.group(1)) == 3, counting[0]

    here = build_sharded(corpus, tmp_path / "here", shards=3, vectors=False)
    assert read_manifest(here)["build"]["pass1"] == {"engine": "in-process"}
    for i in range(3):
        for name in ("body_weight", "body_docs", "title_weight", "doc_len"):
            a = here / f"shard-{i:03d}" / f"{name}.npy"
            b = out / f"shard-{i:03d}" / f"{name}.npy"
            assert a.read_bytes() == b.read_bytes(), (i, name)
