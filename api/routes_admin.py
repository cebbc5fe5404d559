"""Admin endpoints behind the bearer token: reload, new model, add/replace and delete entries."""

from __future__ import annotations

import dataclasses
import json
import logging
import traceback
from collections.abc import Callable
from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, HTTPException

from reranker import RerankerError
from retriever import IndexFormatError, RetrieverError, check_titles

from . import schemas as s
from .deps import Runtime, RuntimeDep, SettingsDep, field_error, require_admin
from .state import Change, NoModelConfiguredError

admin = APIRouter(prefix="/v1/admin", tags=["admin"], dependencies=[Depends(require_admin)])
_404: dict[int | str, dict[str, Any]] = {404: {"description": "not found", "model": s.ErrorOut}}
_409: dict[int | str, dict[str, Any]] = {
    409: {"description": "change not applied; the old files keep serving", "model": s.ErrorOut}
}
log = logging.getLogger("hunchwise.serve")


def _change(c: Change, runtime: Runtime) -> s.ChangeOut:
    return s.ChangeOut(**dataclasses.asdict(c), articles=runtime.serving.current.index.n_docs)


def _not_applied(runtime: Runtime, what: str, exc: Exception) -> HTTPException:
    if not isinstance(exc, RerankerError | RetrieverError | NoModelConfiguredError):
        log.error("%s failed", what, exc_info=exc)  # unexpected: the traceback helps
    # The failed load's frames hold the pair still serving; the error travels on through
    # reference cycles in the framework, which only the (frozen) collector would break, so
    # the old pair would outlive its swap. Dropping the frames' variables frees it.
    traceback.clear_frames(exc.__traceback__)
    cur = runtime.serving.current
    return HTTPException(
        409,
        f"{what} failed, still serving index {cur.index.version} and model "
        f"{cur.model_version or '(none)'}: {exc}",
    )


def _counted_reload(runtime: Runtime, what: str, swap: Callable[[], Change]) -> s.ChangeOut:
    """Run a swap of the served files, counted in /metrics; any failure is a 409 and the old
    files keep serving."""
    try:
        change = swap()
    except Exception as exc:  # whatever fails to load is refused; the old pair keeps serving
        runtime.metrics.reloads.labels("admin", "failed").inc()
        raise _not_applied(runtime, what, exc) from exc
    runtime.metrics.reloads.labels("admin", "ok").inc()
    return _change(change, runtime)


@admin.post("/reload", response_model=s.ChangeOut, responses=_409)
def reload(runtime: RuntimeDep) -> s.ChangeOut:
    """Read the index folder and the model file again and swap them in (all workers follow)."""
    return _counted_reload(runtime, "reload", runtime.serving.reload)


@admin.put("/model", response_model=s.ChangeOut, responses=_409)
def put_model(
    artifact: Annotated[
        dict[str, Any], Body(description="the content of a model file written by hunchwise train")
    ],
    runtime: RuntimeDep,
) -> s.ChangeOut:
    """Serve a new model: checked and loaded first, then written over the configured model
    file (temp file + rename) and taken up by every worker. A model that does not load is
    refused with 409 and changes nothing."""
    text = json.dumps(artifact, indent=1)
    return _counted_reload(
        runtime, "loading the new model", lambda: runtime.serving.put_model(text)
    )


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
    index = runtime.serving.current.index
    # Checked against the served index before taking the admin lock; update_index checks again.
    check_titles(zip(index.ids, index.titles, strict=True), articles)
    try:
        change = runtime.serving.put_entries([a.model_dump() for a in articles])
    except IndexFormatError as exc:
        raise _not_applied(runtime, "updating the index", exc) from exc
    return _change(change, runtime)


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
