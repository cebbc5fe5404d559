"""The FastAPI application factory: `create_app(settings)` and the env-driven `app_from_env`."""

from __future__ import annotations

import functools
import gc
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

import anyio
from fastapi import FastAPI, HTTPException
from fastapi.middleware.cors import CORSMiddleware
from threadpoolctl import threadpool_limits

from retriever import Index, atomicfile, load_index

from . import fastlane, routes, routes_admin, schemas
from .deps import Runtime, admin_refusal
from .handlers import BodyLimitMiddleware, SafeJSONResponse, install_handlers
from .metrics import Metrics, MetricsMiddleware
from .parentwatch import end_with_parent
from .settings import ServiceSettings, settings_from_env

DESCRIPTION = """\
Rank the articles of your own encyclopedia-style corpus for a free-text clue: BM25
candidates, calibrated probabilities from the reranker model, and a decision (answer,
wait for more words, or abstain once `complete` is true). Without a model the candidates
come in BM25 order with null probabilities, and the reply says so.

**Served log.** With `--log-dir`, every ranked clue (batch clues one line each) and every
feedback is appended to `served.jsonl` as one JSON line, rotated by size to
`served.1.jsonl`, `served.2.jsonl`, ... `hunchwise train --log served.jsonl` reads it back.

**Feedback.** Request ids are signed (HMAC), so any worker accepts the id of any other and
rejects made-up ones with 404. Feedback for the same request twice is accepted and logged
twice; the trainer uses the last one. A title or alias naming one article is accepted as
the answer and logged as that article's id.

**Several workers.** An admin call reaches one worker. It copies the new files into the
shared state folder, loads them from there (files that do not load are refused with 409
and the old ones keep serving), then writes a generation marker; every worker looks at the
marker about every 0.5 s and loads what changed into a fresh container, swapped in one
assignment. Requests in flight finish on the container they started with. A worker that
restarts loads the last files that loaded, not whatever is in place now. `/metrics` sums
all workers (prometheus_client multiprocess mode).

**Admin** endpoints need `Authorization: Bearer <token>` (HUNCHWISE_ADMIN_TOKEN or
`--admin-token-file`); without a configured token they answer 403. The token is checked
before the body is read; `PUT /v1/admin/model` takes a new model file's content.
"""

_COMMON: dict[int | str, dict[str, Any]] = {
    400: {
        "description": "malformed request (e.g. a bad Content-Length)",
        "model": schemas.ErrorOut,
    },
    413: {"description": "request body over the configured limit", "model": schemas.ErrorOut},
    503: {
        "description": "the server is starting or the index is unreadable",
        "model": schemas.ErrorOut,
    },
}
_ADMIN: dict[int | str, dict[str, Any]] = {
    401: {"description": "missing or wrong admin token", "model": schemas.ErrorOut},
    403: {
        "description": "admin endpoints are disabled (no token configured)",
        "model": schemas.ErrorOut,
    },
}


STARTUP_FAILURE_NOTE = "worker-failed.txt"  # in the state folder: why a worker could not start


def create_app(
    settings: ServiceSettings | None = None,
    *,
    resume: bool = False,
    open_index: Callable[[Path], Index] = load_index,
) -> FastAPI:
    """A new application; the index and model are loaded when its lifespan starts.

    resume: start from the last good files in the state folder, as a worker of
    `hunchwise serve` does (its siblings may serve files newer than the configured ones).
    open_index: how the index folder is opened (`load_index`; the Ray front of
    api/rayserve.py opens a sharded folder whose shards search on the cluster).
    """
    settings = settings if settings is not None else ServiceSettings()  # type: ignore[call-arg]
    metrics = Metrics()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # Loaded once per process into one read-only container; requests share it.
        try:
            runtime = await anyio.to_thread.run_sync(
                functools.partial(
                    Runtime.start, settings, metrics, resume=resume, open_index=open_index
                )
            )
        except Exception as exc:
            # uvicorn stops every worker when one cannot start; the note lets `hunchwise
            # serve` say why and exit with an error instead of 0.
            if settings.state_dir is not None:
                atomicfile.write_text(settings.state_dir / STARTUP_FAILURE_NOTE, str(exc))
            raise
        app.state.runtime = runtime
        # Everything loaded so far (libraries, index, model) lives as long as the process:
        # freezing it keeps the collector's full passes from walking it. Measured at 100k
        # articles: full passes fell from ~110 ms to ~5 ms, which had been the p99 of
        # rank requests. (gc.freeze after start-up is common practice, no source.)
        gc.collect()
        gc.freeze()
        # One BLAS thread per worker (every worker runs this): requests only do tiny
        # products, and idle BLAS threads spinning beside the other workers cost far more
        # than they save. Measured at 100k articles, 2 workers: 292 -> 532-714 requests/s
        # closed loop over six runs.
        threadpool_limits(limits=1)
        try:
            yield
        finally:
            app.state.runtime = None
            runtime.close()

    app = FastAPI(
        title="hunchwise",
        version="0.1.0",
        description=DESCRIPTION,
        lifespan=lifespan,
        default_response_class=SafeJSONResponse,
    )
    app.state.settings = settings
    app.state.runtime = None
    app.include_router(routes.router, responses=_COMMON)
    app.include_router(routes_admin.admin, responses={**_COMMON, **_ADMIN})
    install_handlers(app)
    _document_limits(app, settings)
    fastlane.install(app)  # innermost: the outer middleware below still see every request
    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=settings.cors_origins,
            allow_methods=["GET", "POST", "PUT", "DELETE"],
            allow_headers=["Authorization", "Content-Type"],
        )

    def admin_gate(authorization: str | None) -> HTTPException | None:
        runtime: Runtime | None = app.state.runtime
        if runtime is None:
            return HTTPException(503, "the server is starting: index and model are not loaded yet")
        return admin_refusal(runtime.admin_token, authorization)

    app.add_middleware(
        BodyLimitMiddleware,
        max_bytes=settings.max_body_bytes,
        admin_max_bytes=settings.max_admin_body_bytes,
        admin_gate=admin_gate,
    )
    app.add_middleware(MetricsMiddleware, metrics=metrics)
    return app


def _document_limits(app: FastAPI, settings: ServiceSettings) -> None:
    """Put the configured limits into the OpenAPI schema (the models only know the types)."""
    plain_openapi = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is not None:
            return app.openapi_schema
        schema = plain_openapi()
        models = schema.get("components", {}).get("schemas", {})
        for name in ("RankRequest", "BatchRankRequest"):
            props = models.get(name, {}).get("properties", {})
            k = props.get("k", {})
            for option in k.get("anyOf", [k]):
                if option.get("type") == "integer":
                    option["maximum"] = settings.max_k
            if "clue" in props:
                props["clue"]["maxLength"] = settings.max_clue_chars
            if "clues" in props:
                props["clues"]["maxItems"] = settings.max_batch
                props["clues"]["items"]["maxLength"] = settings.max_clue_chars
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


def app_from_env() -> FastAPI:
    """Factory for uvicorn workers: settings come from the HUNCHWISE_* environment."""
    end_with_parent()
    return create_app(settings_from_env(), resume=True)
