"""The training table's rows built in blocks of prefixes by workers on a Ray cluster.

The driver reads the logs and lists every prefix (`labelled_prefixes`: cheap); Ray Data
hands blocks of prefixes to workers, each of which opens the index once and builds their
rows with the same function the in-process build uses (`prefixrows.prefix_rows`). A prefix's
rows depend on that prefix alone, and the blocks come back ordered by prefix, so the table
equals the in-process one.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np

from retriever import Index
from retriever.cluster import Runner
from retriever.shardview import open_whole

from ..candidates import CandidatePolicy
from ..features import FeatureRegistry, MetadataColumns
from .prefixrows import _DTYPES, Prefixes, prefix_rows

BLOCK = 256  # prefixes per block


class TableWorker:
    """Builds the rows of blocks of prefixes over an index it opens once."""

    def __init__(
        self,
        index_path: str,
        title_weight: float,
        registry: FeatureRegistry,
        names: list[str],
        k: int,
        metadata: MetadataColumns,
        policy: CandidatePolicy,
    ) -> None:
        self.index = open_whole(index_path, title_weight=title_weight)
        self.registry, self.names, self.k = registry, names, k
        self.metadata, self.policy = metadata, policy

    def __call__(self, batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        gold = batch["gold"].tolist()
        owners = [
            (int(c), float(f), None if g < 0 else int(g), json.loads(str(m)))
            for c, f, g, m in zip(
                batch["clue"].tolist(),
                batch["fraction"].tolist(),
                gold,
                batch["meta"].tolist(),
                strict=True,
            )
        ]
        out = prefix_rows(
            self.index,
            [str(t) for t in batch["text"].tolist()],
            owners,
            [int(g) for g in batch["seq"].tolist()],
            self.registry,
            self.names,
            k=self.k,
            metadata=self.metadata,
            candidates=self.policy,
            policies=[
                CandidatePolicy.from_dict(json.loads(str(p))) for p in batch["policy"].tolist()
            ],
        )
        out["seq"] = out["group"].copy()
        return out


def _columns(
    pre: Prefixes, policy: CandidatePolicy, policies: Sequence[CandidatePolicy] | None
) -> dict[str, Any]:
    """The prefixes as the columns a TableWorker reads."""
    n = len(pre.texts)
    return {
        "seq": np.arange(n, dtype=np.int64),
        "text": np.asarray(pre.texts, dtype=object),
        "clue": np.asarray([o[0] for o in pre.owners], dtype=np.int64),
        "fraction": np.asarray([o[1] for o in pre.owners], dtype=np.float64),
        "gold": np.asarray([-1 if o[2] is None else o[2] for o in pre.owners], dtype=np.int64),
        "meta": np.asarray([json.dumps(o[3]) for o in pre.owners], dtype=object),
        "policy": np.asarray(
            [json.dumps((policies[i] if policies else policy).to_dict()) for i in range(n)],
            dtype=object,
        ),
    }


def row_blocks(
    runner: Runner,
    index: Index,
    pre: Prefixes,
    registry: FeatureRegistry,
    feature_names: Sequence[str],
    k: int,
    metadata: MetadataColumns,
    policy: CandidatePolicy,
    policies: Sequence[CandidatePolicy] | None = None,
) -> list[Any]:
    """The rows of every prefix as blocks left on the cluster: one object reference per
    block (a dict of the table's columns, `X` and the bookkeeping ones, whole prefixes in
    prefix order), none of them fetched by the driver. The Ray Data job's record is
    appended to `runner.data_runs`."""
    if not pre.texts:
        return []
    ray = runner.ray
    with warnings.catch_warnings():
        # As in retriever/cluster.py: Ray Data's first DataContext warns about its own
        # deprecated options (Ray 2.60); nothing here sets them.
        warnings.filterwarnings("ignore", category=DeprecationWarning, module=r"ray\.data\.context")
        ctx = ray.data.DataContext.get_current()
    ctx.enable_progress_bars = False
    ctx.raise_original_map_exception = True
    ctx.execution_options.preserve_order = True  # blocks in prefix order: sums in one order
    columns = _columns(pre, policy, policies)
    names = list(columns)
    values = [columns[c].tolist() for c in names]
    rows = [dict(zip(names, r, strict=True)) for r in zip(*values, strict=True)]
    args = (str(index.path), index.title_weight, registry, list(feature_names), k, metadata)
    ds = ray.data.from_items(rows).map_batches(
        TableWorker,
        fn_constructor_args=(*args, policy),
        batch_size=BLOCK,
        batch_format="numpy",
        **runner.worker_pool(),
    )
    refs = ds.to_numpy_refs()
    runner.data_runs.append(ds.stats())
    return list(refs)


def distributed_rows(
    runner: Runner,
    index: Index,
    pre: Prefixes,
    registry: FeatureRegistry,
    feature_names: Sequence[str],
    k: int,
    metadata: MetadataColumns,
    policy: CandidatePolicy,
    policies: Sequence[CandidatePolicy] | None = None,
) -> dict[str, np.ndarray]:
    """`prefix_rows` of every prefix in `pre`, built by the runner's workers, in order;
    `policies`: each prefix's own candidate policy instead of `policy`."""
    columns = _columns(pre, policy, policies)
    args = (
        str(index.path),
        index.title_weight,
        registry,
        list(feature_names),
        k,
        metadata,
        policy,
    )
    out = runner.map_batches(columns, TableWorker, args, BLOCK)
    if not out:  # no prefix at all
        width = len(feature_names) + len(metadata.names)
        return {"X": np.zeros((0, width)), **{c: np.zeros(0, dt) for c, dt in _DTYPES.items()}}
    out.pop("seq")
    return out
