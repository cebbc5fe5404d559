"""Sharded serving on Ray Serve: one deployment per shard, and the HTTP API in front of them.

Each shard deployment (`ShardSearcher`, replicas configurable) memory-maps its shard folder
and answers "the top k for these analysed query terms" with (score, global row) pairs,
"the k nearest articles to these clue vectors" (hybrid models: the front makes each clue's
vector once from the shared word vectors; a refined generation is named by the model) with
(global rows, cosines), "the BM25 scores of these rows", and, for hybrid candidates, the
first two in one call with the nearest rows' BM25 scores (retriever/shardfanout.py's
`ShardWork`, whose calls are sent by `RemoteShards`). A metadata filter is compiled
at the front over the whole corpus and each shard is sent its part of the mask, packed to
bits. The
front deployment (`Front`) is the ordinary FastAPI application of api/app.py, mounted as the
Serve ingress: the same routes, served log, feedback and request ids as `hunchwise serve`.
The one thing swapped is how the index folder is opened (the `open_index` seam of
`create_app` -> `Runtime.start` -> `Serving`): a `retriever.shardview.ShardedView`, which
reads the candidates' rows from the shard folders and sends every search to all shard
deployments at once, merging their lists as a single index orders its hits.

Ray is imported here and in retriever/shards.py only; `hunchwise serve --ray` imports this
module, plain `hunchwise serve` never does.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any, cast

import numpy as np
import ray
from fastapi import FastAPI
from ray import serve

from reranker import load_model
from retriever import Index, IndexFormatError
from retriever.sharded import read_manifest
from retriever.shardfanout import ShardCalls, ShardWork, Wired, pack
from retriever.shardview import ShardedView

from .app import create_app
from .settings import ServiceSettings

APP_NAME = "hunchwise"


def describe(index: Index, first_row: int) -> dict[str, Any]:
    """What a shard deployment and the front must agree on about one shard."""
    info = index.manifest.get("shard", {})
    return {
        "folder": index.path.name,
        "first_row": first_row,
        "articles": index.n_docs,
        "index_version": index.version,
        "stats_sha256": info.get("stats_sha256"),
    }


@serve.deployment(ray_actor_options={"num_cpus": 1})
class ShardSearcher(ShardWork):
    """One shard's folder, memory-mapped; answers `ShardWork`'s calls (masks come packed)."""

    def __init__(self, folder: str, first_row: int, stats_sha256: str) -> None:
        super().__init__(Index(folder), first_row)
        got = self.index.manifest.get("shard", {}).get("stats_sha256")
        if got != stats_sha256:
            raise IndexFormatError(
                f"{folder}: statistics checksum {str(got)[:12]}, the top manifest's "
                f"{stats_sha256[:12]}: built with other corpus statistics; rebuild the index"
            )

    def describe(self) -> dict[str, Any]:
        """This shard's identity (see `describe`)."""
        return describe(self.index, self.first_row)


class RemoteShards(ShardCalls):
    """`retriever.shardfanout.FanOut` over the shard deployments: each call is sent to every
    shard before waiting for any, a filter's mask packed to bits."""

    def __init__(self, handles: Sequence[Any]) -> None:
        self.handles = list(handles)  # DeploymentHandles, in shard order
        self.n_shards = len(self.handles)

    def wire(self, mask: np.ndarray) -> Wired:
        """See `ShardCalls.wire`."""
        return pack(mask)

    def each(self, method: str, args: Sequence[tuple[Any, ...] | None]) -> list[Any]:
        """See `ShardCalls.each`."""
        pending = [
            None if a is None else getattr(h, method).remote(*a)
            for h, a in zip(self.handles, args, strict=True)
        ]
        return [None if p is None else p.result() for p in pending]


@serve.deployment(ray_actor_options={"num_cpus": 1})
@serve.ingress()
class Front:
    """The HTTP API (api/app.py) over a sharded index whose shards search on the cluster."""

    def __init__(self, settings: ServiceSettings, shards: list[Any]) -> None:
        self.settings = settings
        self.shards = shards  # DeploymentHandles, in shard order

    def __serve_build_asgi_app__(self) -> FastAPI:
        return create_app(self.settings, open_index=self.open_index)

    def open_index(self, folder: Path) -> Index:
        """The sharded folder as one index searched by the shard deployments, refused if a
        deployment serves another shard than the folder's."""
        view = ShardedView(folder, RemoteShards(self.shards))
        pending = [h.describe.remote() for h in self.shards]
        served = [p.result() for p in pending]
        if len(served) != len(view.shards):
            raise IndexFormatError(
                f"{folder}: {len(view.shards)} shards, but {len(served)} shard deployments run"
            )
        for shard, first, remote in zip(view.shards, view.first_rows, served, strict=True):
            here = describe(shard, first)
            if remote != here:
                diff = sorted(k for k in here if here[k] != remote.get(k))
                raise IndexFormatError(
                    f"{shard.path}: the shard deployment serves another shard ({', '.join(diff)} "
                    "differ); restart the sharded service on this folder"
                )
        return view


def check_files(settings: ServiceSettings) -> str:
    """Open the sharded folder and the model as the front will; a one-line summary.

    Refuses (IndexFormatError naming the shard) a folder whose shards were built with other
    statistics than the top manifest's, before anything is deployed.
    """
    view = ShardedView(settings.index_dir)
    model = (
        None
        if settings.model_path is None
        else load_model(settings.model_path, index=view, user_features=settings.user_features)
    )
    what = f"model {model.version}" if model is not None else "no model: BM25 order only"
    return (
        f"serving sharded index {view.version} ({view.n_docs} articles in "
        f"{len(view.shards)} shards), {what}"
    )


def deployment(settings: ServiceSettings, shard_replicas: int, front_replicas: int = 1) -> Any:
    """The Serve application: one `ShardSearcher` per shard folder, `Front` over them
    (`front_replicas` copies of it: the proxy spreads the requests among them)."""
    manifest = read_manifest(settings.index_dir)
    sha = str(manifest.get("stats", {}).get("sha256"))
    handles: list[Any] = [
        cast(Any, ShardSearcher)
        .options(name=f"shard-{i:03d}", num_replicas=shard_replicas)
        .bind(str(settings.index_dir / str(entry["folder"])), int(entry["first_row"]), sha)
        for i, entry in enumerate(manifest["shards"])
    ]
    front = cast(Any, Front).options(name="front", num_replicas=front_replicas)
    return front.bind(settings, handles)


def listening(host: str, port: int) -> str:
    """Where Ray Serve's HTTP proxy listens, as a URL (with a note when that is not where
    `serve.start` was asked: Serve already ran on the cluster and keeps its first address)."""
    # Ray Serve has no public call for its running HTTP options (ServeInstanceDetails
    # carries them only through the dashboard's REST API); the client holds them.
    from ray.serve.context import _get_global_client

    # It raises when no Serve controller runs: serve.start has just started or found one.
    config = cast(Any, _get_global_client()).http_config
    url = f"http://{config.host}:{config.port}"
    if (config.host, config.port) == (host, port):
        return url
    return (
        f"{url} (Ray Serve already ran on this cluster and keeps the address it started "
        f"with, not {host}:{port}; to move it, `serve shutdown` first, which stops every "
        "Serve application on the cluster)"
    )


def run(
    settings: ServiceSettings,
    address: str,
    *,
    host: str,
    port: int,
    shard_replicas: int,
    front_replicas: int = 1,
) -> int:
    """Serve until SIGINT or SIGTERM on the Ray cluster at `address` ('local': start one
    here); then delete the application (a local cluster stops with this process)."""
    for name, n in (("--shard-replicas", shard_replicas), ("--front-replicas", front_replicas)):
        if n < 1:
            raise ValueError(f"{name} must be at least 1, got {n}")
    summary = check_files(settings)
    local = address == "local"
    n_shards = len(read_manifest(settings.index_dir)["shards"])
    ray.init(
        address=None if local else address,
        # Each replica asks for one CPU; a local cluster counts at least one per replica,
        # so a small machine still places them all (a real cluster is sized for them).
        num_cpus=max(os.cpu_count() or 1, n_shards * shard_replicas + front_replicas)
        if local
        else None,
        include_dashboard=False if local else None,
        log_to_driver=False,
    )
    stop = threading.Event()

    def on_signal(*_: Any) -> None:
        if not stop.is_set() and serving.is_set():
            stop.set()
        else:  # still deploying (or asked twice): give up where it is, and clean up
            raise KeyboardInterrupt

    serving = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, on_signal)
    try:
        serve.start(http_options={"host": host, "port": port})
        where = listening(host, port)
        serve.run(
            deployment(settings, shard_replicas, front_replicas),
            name=APP_NAME,
            route_prefix="/",
            blocking=False,
        )
        print(
            f"{summary}, {shard_replicas} replica(s) per shard and {front_replicas} front "
            f"replica(s) on Ray at {ray.get_runtime_context().gcs_address}, {where}",
            flush=True,
        )
        serving.set()
        stop.wait()
    finally:
        with contextlib.suppress(Exception):  # whatever failed above was reported already
            serve.delete(APP_NAME)
            if local:
                serve.shutdown()
        ray.shutdown()
    return 0
