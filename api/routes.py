"""The endpoints: rank, batch rank, feedback, entries, info, health, metrics and admin.

Handlers that search or score are plain `def`: FastAPI runs them in its thread pool, so a
CPU-bound request never blocks the event loop. Each handler reads `serving.current` once,
so it works on one consistent index/model pair even if a reload swaps it meanwhile.
"""

from __future__ import annotations

import math
import os
import time
from typing import Annotated, Any, Literal, cast

from fastapi import APIRouter, Body, Depends, HTTPException, Request, Response
from pydantic import BaseModel

from reranker import Payoff, Ranking, RerankerError, rank_clue, rank_clues
from retriever import IndexFormatError, RetrieverError

from . import schemas as s
from .deps import (
    Runtime,
    RuntimeDep,
    SettingsDep,
    check_clue,
    check_k,
    field_error,
    require_admin,
)
from .handlers import SafeJSONResponse
from .servedlog import utc_now
from .state import Change, Loaded

router = APIRouter()
Action = Literal["answer", "wait", "abstain"]
admin = APIRouter(prefix="/v1/admin", tags=["admin"], dependencies=[Depends(require_admin)])
NO_MODEL_NOTE = "no model loaded: candidates are in BM25 order and carry no probability"
_404: dict[int | str, dict[str, Any]] = {404: {"description": "not found", "model": s.ErrorOut}}
_409: dict[int | str, dict[str, Any]] = {
    409: {"description": "change not applied; the old files keep serving", "model": s.ErrorOut}
}


def _json(model: BaseModel) -> Response:
    # The reply is built from our own validated values; serializing it straight to bytes
    # (pydantic-core) skips FastAPI's second validation pass, a large share of a rank call.
    return Response(model.__pydantic_serializer__.to_json(model), media_type="application/json")


def _finite(features: dict[str, float]) -> dict[str, float | None]:
    """Features with NaN/inf as None (JSON has no such numbers); the same dict when all finite."""
    # One C-level sum finds the common all-finite case without a Python loop per value.
    if math.isfinite(sum(features.values())):
        return features  # type: ignore[return-value]
    return {k: v if math.isfinite(v) else None for k, v in features.items()}


def _result(request_id: str, r: Ranking, include_features: bool) -> s.RankResult:
    cands = [
        s.CandidateOut(
            id=c.doc_id,
            title=c.title,
            qualifier=c.qualifier,
            score=c.score,
            rank=c.rank,
            probability=c.probability,
            features=_finite(c.features) if include_features else None,
        )
        for c in r.candidates
    ]
    d = r.decision
    decision = s.DecisionOut(
        action=cast(Action, d.action),
        id=d.doc_id,
        probability=d.probability,
        threshold=d.threshold,
        reason=d.reason,
    )
    return s.RankResult(request_id=request_id, clue=r.clue, candidates=cands, decision=decision)


def _served(
    request_id: str, r: Ranking, k: int, complete: bool, when: str, metadata: dict[str, Any] | None
) -> dict[str, Any]:
    # The shape the trainer reads back (reranker.logs.read_logs); keep it stable.
    d = r.decision
    record: dict[str, Any] = {
        "kind": "served",
        "request_id": request_id,
        "time": when,
        "clue": r.clue,
        "k": k,
        "complete": complete,
        "index_version": r.index_version,
        "model_version": r.model_version,
        "candidates": [
            {
                "id": c.doc_id,
                "title": c.title,
                "score": c.score,
                "rank": c.rank,
                "probability": c.probability,
                "features": _finite(c.features),
            }
            for c in r.candidates
        ],
        "decision": {
            "action": d.action,
            "id": d.doc_id,
            "probability": d.probability,
            "threshold": d.threshold,
            "reason": d.reason,
        },
    }
    if metadata:
        record["metadata"] = metadata
    return record


def _payoff(p: s.PayoffIn | None) -> Payoff | None:
    return None if p is None else Payoff(reward=p.reward, penalty=p.penalty)


def _ranked_by(loaded: Loaded) -> Literal["probability", "bm25"]:
    return "bm25" if loaded.model is None else "probability"


def _record(runtime: Runtime, rankings: list[Ranking]) -> None:
    runtime.metrics.clues.labels(
        "bm25" if rankings[0].model_version is None else "probability"
    ).inc(len(rankings))
    for r in rankings:
        runtime.metrics.decisions.labels(r.decision.action).inc()


@router.post("/v1/rank", response_model=s.RankResponse, tags=["rank"])
def rank(body: s.RankRequest, runtime: RuntimeDep, settings: SettingsDep) -> Response:
    """Candidates for one clue, sorted by calibrated probability, and what to do now."""
    started = time.perf_counter()
    check_clue(body.clue, settings, ("body", "clue"))
    k = check_k(body.k, settings)
    loaded = runtime.serving.current
    r = rank_clue(
        loaded.index,
        loaded.model,
        body.clue,
        k=k,
        payoff=_payoff(body.payoff),
        complete=body.complete,
        metadata=body.metadata,
        include_features=body.include_features or loaded.model is not None,
    )
    ranked = time.perf_counter()
    rid = runtime.ids.new()
    if runtime.served_log is not None:
        runtime.served_log.append([_served(rid, r, k, body.complete, utc_now(), body.metadata)])
    _record(runtime, [r])
    res = _result(rid, r, body.include_features)
    done = time.perf_counter()
    reply = s.RankResponse(
        **dict(res),
        k=k,
        complete=body.complete,
        ranked_by=_ranked_by(loaded),
        note=NO_MODEL_NOTE if loaded.model is None else None,
        index_version=r.index_version,
        model_version=r.model_version,
        timing=s.TimingOut(rank_ms=(ranked - started) * 1e3, total_ms=(done - started) * 1e3),
    )
    return _json(reply)


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
    k = check_k(body.k, settings)
    loaded = runtime.serving.current
    rankings = rank_clues(
        loaded.index,
        loaded.model,
        body.clues,
        k=k,
        payoff=_payoff(body.payoff),
        complete=body.complete,
        include_features=body.include_features or loaded.model is not None,
    )
    ranked = time.perf_counter()
    rids = [runtime.ids.new() for _ in rankings]
    if runtime.served_log is not None:
        when = utc_now()
        runtime.served_log.append(
            [
                _served(rid, r, k, body.complete, when, None)
                for rid, r in zip(rids, rankings, strict=True)
            ]
        )
    _record(runtime, rankings)
    results = [
        _result(rid, r, body.include_features) for rid, r in zip(rids, rankings, strict=True)
    ]
    done = time.perf_counter()
    reply = s.BatchRankResponse(
        results=results,
        k=k,
        complete=body.complete,
        ranked_by=_ranked_by(loaded),
        note=NO_MODEL_NOTE if loaded.model is None else None,
        index_version=loaded.index.version,
        model_version=loaded.model_version,
        timing=s.TimingOut(rank_ms=(ranked - started) * 1e3, total_ms=(done - started) * 1e3),
    )
    return _json(reply)


@router.post("/v1/feedback", response_model=s.FeedbackResponse, responses=_404, tags=["rank"])
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
                ("body", "answer"), f"no article with id {body.answer!r} in the index"
            )
    recorded = runtime.served_log is not None
    if runtime.served_log is not None:
        runtime.served_log.append(
            [
                {
                    "kind": "feedback",
                    "request_id": body.request_id,
                    "time": utc_now(),
                    "answer": answer,
                }
            ]
        )
    return s.FeedbackResponse(request_id=body.request_id, answer=answer, recorded=recorded)


def _entry(runtime: Runtime, doc_id: str) -> s.EntryOut:
    d = runtime.serving.current.index.document(doc_id)
    return s.EntryOut(
        id=d.id,
        title=d.title,
        base=d.base,
        qualifier=d.qualifier,
        text=d.text,
        links=list(d.links),
        aliases=list(d.aliases),
        popularity=d.popularity,
        inlinks=d.inlinks,
        metadata=d.metadata,
    )


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
    features = [] if loaded.model is None else list(loaded.model.feature_names_)
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
    body = s.ReadyOut(
        ready=ready,
        index_version=None if loaded is None else loaded.index.version,
        model_version=None if loaded is None else loaded.model_version,
        model_configured=configured,
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


def _change(c: Change, runtime: Runtime) -> s.ChangeOut:
    return s.ChangeOut(
        generation=c.generation,
        index_version=c.index_version,
        model_version=c.model_version,
        previous_index_version=c.previous_index_version,
        previous_model_version=c.previous_model_version,
        articles=runtime.serving.current.index.n_docs,
    )


def _not_applied(runtime: Runtime, what: str, exc: Exception) -> HTTPException:
    cur = runtime.serving.current
    return HTTPException(
        409,
        f"{what} failed, still serving index {cur.index.version} and model "
        f"{cur.model_version or '(none)'}: {exc}",
    )


@admin.post("/reload", response_model=s.ChangeOut, responses=_409)
def reload(runtime: RuntimeDep) -> s.ChangeOut:
    """Read the index folder and the model file again and swap them in (all workers follow)."""
    try:
        change = runtime.serving.reload()
    except (RetrieverError, RerankerError, OSError, ValueError) as exc:
        runtime.metrics.reloads.labels("admin", "failed").inc()
        raise _not_applied(runtime, "reload", exc) from exc
    runtime.metrics.reloads.labels("admin", "ok").inc()
    return _change(change, runtime)


@admin.post("/entries", response_model=s.ChangeOut, responses=_409)
def put_entries(
    articles: Annotated[
        list[s.ArticleIn], Body(min_length=1, description="articles to add or replace")
    ],
    runtime: RuntimeDep,
    settings: SettingsDep,
) -> s.ChangeOut:
    """Add articles, or replace those with the same id, and serve the updated index."""
    if len(articles) > settings.max_entries_per_call:
        raise field_error(
            ("body",),
            f"List should have at most {settings.max_entries_per_call} items (got {len(articles)})",
            "too_long",
        )
    _check_titles(runtime, articles)
    try:
        change = runtime.serving.put_entries([a.model_dump() for a in articles])
    except IndexFormatError as exc:
        raise _not_applied(runtime, "updating the index", exc) from exc
    return _change(change, runtime)


def _check_titles(runtime: Runtime, articles: list[s.ArticleIn]) -> None:
    """A title may not move to another id (the reader would name no list position for it)."""
    index = runtime.serving.current.index
    wanted = {a.title.strip(): i for i, a in enumerate(articles)}
    new_ids = {a.id for a in articles}
    for doc_id, title in zip(index.ids, index.titles, strict=True):
        i = wanted.get(title)
        if i is not None and doc_id not in new_ids:
            raise field_error(
                ("body", i, "title"), f"title {title!r} already belongs to article {doc_id!r}"
            )


@admin.delete("/entries/{doc_id:path}", response_model=s.ChangeOut, responses={**_404, **_409})
def delete_entry(doc_id: str, runtime: RuntimeDep) -> s.ChangeOut:
    """Remove one article and serve the updated index."""
    current = runtime.serving.current.index
    if current.n_docs == 1 and doc_id in current.ids:
        raise HTTPException(409, "cannot remove the last article: an index needs at least one")
    try:
        change = runtime.serving.remove_entry(doc_id)
    except IndexFormatError as exc:
        raise _not_applied(runtime, "updating the index", exc) from exc
    return _change(change, runtime)
