"""The public endpoints: rank, batch rank, feedback, entries, info, health and metrics.

Handlers that search or score are plain `def`: FastAPI runs them in its thread pool, so a
CPU-bound request never blocks the event loop for long. The exception is POST /v1/rank: one
clue (its length capped) is about a millisecond of work, less than the trip to a pool thread
and back added, so it runs on the event loop unless every log write waits for fsync. Each
handler reads `serving.current` once, so it works on one consistent index/model pair even if
a reload swaps it meanwhile.
"""

from __future__ import annotations

import os
import time
from typing import Any, Literal

from fastapi import APIRouter, Depends, HTTPException, Request, Response
from starlette.concurrency import run_in_threadpool

from reranker import Payoff, Ranking, ServedModel, model_k, rank_clues
from reranker.servedrecords import feedback_record, served_record

from . import schemas as s
from .deps import (
    Runtime,
    RuntimeDep,
    SettingsDep,
    check_clue,
    check_k,
    field_error,
    log_records,
    require_feedback_token,
)
from .handlers import SafeJSONResponse
from .replies import json_reply, rank_result
from .servedlog import utc_now
from .settings import ServiceSettings
from .state import Loaded

router = APIRouter()
NO_MODEL_NOTE = "no model loaded: candidates are in BM25 order and carry no probability"
_404: dict[int | str, dict[str, Any]] = {404: {"description": "not found", "model": s.ErrorOut}}


def _payoff(p: s.PayoffIn | None) -> Payoff | None:
    return None if p is None else Payoff(reward=p.reward, penalty=p.penalty)


def _ranked_by(loaded: Loaded) -> Literal["probability", "bm25"]:
    return "bm25" if loaded.model is None else "probability"


def _model_k(loaded: Loaded) -> int | None:
    return None if loaded.model is None else model_k(loaded.model)


def _explainer(body: s.RankRequest | s.BatchRankRequest, loaded: Loaded) -> ServedModel | None:
    """The model to explain the reply's candidates with (None: no explanations)."""
    return loaded.model if body.explain else None


def _record(runtime: Runtime, rankings: list[Ranking]) -> None:
    metrics = runtime.metrics
    by = "bm25" if rankings[0].model_version is None else "probability"
    metrics.child(metrics.clues, by).inc(len(rankings))
    for r in rankings:
        metrics.child(metrics.decisions, r.decision.action).inc()


def _rank_and_log(
    body: s.RankRequest | s.BatchRankRequest,
    clues: list[str],
    metadata: list[dict[str, Any] | None],
    runtime: Runtime,
    settings: ServiceSettings,
) -> tuple[Loaded, int, list[tuple[str, Ranking]], float]:
    """Rank the clues on the files served now, log what is served, count it: (the files,
    the k used, (request id, ranking) per clue, when ranking ended)."""
    loaded = runtime.serving.current
    k = check_k(body.k, settings, _model_k(loaded))
    rankings = rank_clues(
        loaded.index,
        loaded.model,
        clues,
        k=k,
        payoff=_payoff(body.payoff),
        complete=body.complete,
        revealed=body.revealed,
        metadata=metadata,
        # Each candidate's features as a dict only where something reads them: the reply,
        # its explanations or the served log (with a model they are computed all the same).
        include_features=body.include_features
        or (loaded.model is not None and (body.explain or settings.log_features)),
        where=body.filter,
        snippets=body.snippet,
    )
    ranked = time.perf_counter()
    served = [(runtime.ids.new(), r) for r in rankings]
    when = utc_now()
    log_records(
        runtime,
        [
            served_record(rid, r, k, body.complete, when, meta, features=settings.log_features)
            for (rid, r), meta in zip(served, metadata, strict=True)
        ],
    )
    _record(runtime, rankings)
    return loaded, k, served, ranked


def _reply_fields(
    body: s.RankRequest | s.BatchRankRequest, loaded: Loaded, k: int, started: float, ranked: float
) -> dict[str, Any]:
    """What a single and a batch reply both say about how they were ranked."""
    done = time.perf_counter()
    return {
        "k": k,
        "model_k": _model_k(loaded),
        "complete": body.complete,
        "revealed": body.revealed,
        "ranked_by": _ranked_by(loaded),
        "note": NO_MODEL_NOTE if loaded.model is None else None,
        "filter": body.filter,
        "index_version": loaded.index.version,
        "model_version": loaded.model_version,
        "timing": {"rank_ms": (ranked - started) * 1e3, "total_ms": (done - started) * 1e3},
    }


@router.post("/v1/rank", response_model=s.RankResponse, tags=["rank"])
async def rank(body: s.RankRequest, runtime: RuntimeDep, settings: SettingsDep) -> Response:
    """Candidates for one clue, sorted by calibrated probability, and what to do now."""
    # Well-formed JSON requests usually reach rank_now through api/fastlane.py instead.
    return await rank_now(body, runtime, settings)


async def rank_now(body: s.RankRequest, runtime: Runtime, settings: ServiceSettings) -> Response:
    """The reply to one validated rank request (the route above and api/fastlane.py)."""
    # On the event loop, not the thread pool: one clue (bounded by max_clue_chars) is about a
    # millisecond of work, and the trip to a pool thread and back cost a large share of
    # that. Batches, as long as the client makes them, stay in the pool.
    # A wait for the disk, snippets (a few milliseconds per candidate), or searches that wait
    # on other processes (shards served on Ray): not on the loop.
    index = runtime.serving.current.index
    if settings.log_fsync or body.snippet or not index.searches_in_process:
        return await run_in_threadpool(_rank_one, body, runtime, settings)
    return _rank_one(body, runtime, settings)


def _rank_one(body: s.RankRequest, runtime: Runtime, settings: ServiceSettings) -> Response:
    started = time.perf_counter()
    check_clue(body.clue, settings, ("body", "clue"))
    loaded, k, [(rid, r)], ranked = _rank_and_log(
        body, [body.clue], [body.metadata], runtime, settings
    )
    res = rank_result(rid, r, body.include_features, _explainer(body, loaded))
    # The reply goes out as built (a RankResponse's fields): see api/replies.py.
    return json_reply({**res, **_reply_fields(body, loaded, k, started, ranked)})


@router.post("/v1/rank/batch", response_model=s.BatchRankResponse, tags=["rank"])
def rank_batch(body: s.BatchRankRequest, runtime: RuntimeDep, settings: SettingsDep) -> Response:
    """Many clues at once (one batch search); each result has its own request_id."""
    started = time.perf_counter()
    if len(body.clues) > settings.max_batch:
        raise field_error(
            ("body", "clues"),
            f"List should have at most {settings.max_batch} items (got {len(body.clues)})",
            "too_long",
            max_length=settings.max_batch,
        )
    for i, clue in enumerate(body.clues):
        check_clue(clue, settings, ("body", "clues", i))
    loaded, k, served, ranked = _rank_and_log(
        body, list(body.clues), [None] * len(body.clues), runtime, settings
    )
    explainer = _explainer(body, loaded)
    results = [rank_result(rid, r, body.include_features, explainer) for rid, r in served]
    return json_reply({**_reply_fields(body, loaded, k, started, ranked), "results": results})


@router.post(
    "/v1/feedback",
    response_model=s.FeedbackResponse,
    responses=_404,
    tags=["rank"],
    dependencies=[Depends(require_feedback_token)],
)
def feedback(body: s.FeedbackRequest, runtime: RuntimeDep) -> s.FeedbackResponse:
    """The right answer to a ranked clue (or null: none of these). Repeats are all logged."""
    if not runtime.ids.valid(body.request_id):
        raise HTTPException(
            404, f"unknown request_id {body.request_id!r}: not issued by this server"
        )
    answer = body.answer
    if answer is not None:
        # An id is expected; a title or alias that names exactly one article is taken too.
        answer = runtime.serving.current.index.resolve(answer)
        if answer is None:
            raise field_error(
                ("body", "answer"),
                f"no article with id, title or alias {body.answer!r} in the index",
            )
    recorded = False
    if runtime.served_log is not None:
        recorded = log_records(
            runtime, [feedback_record(body.request_id, answer, utc_now())], feedback=True
        )
        if not recorded:
            raise HTTPException(
                503, f"the label could not be stored ({runtime.log_error}); send it again"
            )
    return s.FeedbackResponse(request_id=body.request_id, answer=answer, recorded=recorded)


def _entry(runtime: Runtime, doc_id: str) -> s.EntryOut:
    # The reply's fields are the Document's (its row aside), read by name.
    document = runtime.serving.current.index.document(doc_id)
    return s.EntryOut.model_validate(document, from_attributes=True)


@router.get(
    "/v1/entries/{doc_id:path}", response_model=s.EntryOut, responses=_404, tags=["entries"]
)
def get_entry(doc_id: str, runtime: RuntimeDep) -> s.EntryOut:
    """One article's stored fields."""
    return _entry(runtime, doc_id)


@router.get("/v1/info", response_model=s.InfoOut, tags=["service"])
def info(runtime: RuntimeDep, settings: SettingsDep) -> s.InfoOut:
    """Index and model versions, features, counts and limits."""
    loaded = runtime.serving.current
    features = [] if loaded.model is None else list(loaded.model.feature_names)
    return s.InfoOut(
        index_version=loaded.index.version,
        model_version=loaded.model_version,
        ranked_by=_ranked_by(loaded),
        features=features,
        articles=loaded.index.n_docs,
        terms=loaded.index.n_terms,
        generation=loaded.generation,
        loaded_at=loaded.loaded_at,
        served_log=runtime.served_log is not None,
        admin_enabled=runtime.admin_token is not None,
        worker_pid=os.getpid(),
        limits=s.LimitsOut(
            default_k=settings.default_k,
            max_k=settings.max_k,
            model_k=_model_k(loaded),
            max_clue_chars=settings.max_clue_chars,
            max_batch=settings.max_batch,
            max_body_bytes=settings.max_body_bytes,
        ),
    )


@router.get("/healthz", response_model=s.HealthOut, tags=["service"])
async def healthz() -> s.HealthOut:
    """Liveness: the process answers."""
    return s.HealthOut(status="ok")


@router.get(
    "/readyz", response_model=s.ReadyOut, responses={503: {"model": s.ReadyOut}}, tags=["service"]
)
async def readyz(request: Request, settings: SettingsDep) -> Any:
    """Readiness: 200 once the index (and the model, if one was configured) is loaded."""
    runtime: Runtime | None = getattr(request.app.state, "runtime", None)
    loaded = None if runtime is None else runtime.serving.current
    configured = settings.model_path is not None
    ready = loaded is not None and (loaded.model is not None or not configured)
    log_error = None if runtime is None else runtime.log_error
    body = s.ReadyOut(
        ready=ready,
        status="starting" if not ready else "degraded" if log_error else "ready",
        index_version=None if loaded is None else loaded.index.version,
        model_version=None if loaded is None else loaded.model_version,
        model_configured=configured,
        log_error=log_error,
    )
    if ready:
        return body
    return SafeJSONResponse(body.model_dump(), status_code=503)


@router.get(
    "/metrics",
    response_class=Response,
    tags=["service"],
    responses={
        200: {
            "content": {"text/plain": {"schema": {"type": "string"}}},
            "description": "Prometheus text exposition format",
        }
    },
)
def metrics(runtime: RuntimeDep) -> Response:
    """Request counts and latency histograms by endpoint (summed over workers)."""
    return Response(runtime.metrics.render(), media_type=runtime.metrics.content_type)
