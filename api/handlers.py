"""JSON responses, the error handlers and the request-body size limit."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from fastapi import FastAPI, Request
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from reranker import ModelFormatError, ModelMismatchError, RerankerError
from retriever import (
    CorpusError,
    FilterError,
    IndexFormatError,
    RetrieverError,
    UnknownDocumentError,
)

from .jsonshape import json_shape, spell_non_finite


class SafeJSONResponse(JSONResponse):
    """JSON with non-ASCII escaped: any string encodes (even lone surrogates); NaN is refused."""

    def render(self, content: Any) -> bytes:
        """Serialize compactly."""
        return json.dumps(
            content, ensure_ascii=True, allow_nan=False, separators=(",", ":")
        ).encode("ascii")


def library_error(request: Request, exc: Exception) -> SafeJSONResponse:
    """The one place where retriever and reranker errors become HTTP statuses."""
    if isinstance(exc, UnknownDocumentError):
        return SafeJSONResponse({"detail": str(exc)}, status_code=404)
    if isinstance(exc, CorpusError):
        # Records of a request body are numbered from 1 by the reader; the body list from 0.
        loc: list[str | int] = ["body"]
        if exc.line:
            loc.append(exc.line - 1)
        if exc.field:
            loc.append(exc.field)
        error = {"type": "value_error", "loc": loc, "msg": exc.reason}
        return SafeJSONResponse({"detail": [error]}, status_code=422)
    if isinstance(exc, FilterError):
        loc = ["body", "filter", *([exc.field] if exc.field else [])]
        error = {"type": "value_error", "loc": loc, "msg": str(exc)}
        return SafeJSONResponse({"detail": [error]}, status_code=422)
    if isinstance(exc, ModelFormatError | ModelMismatchError):
        return SafeJSONResponse({"detail": str(exc)}, status_code=409)
    if isinstance(exc, IndexFormatError):
        return SafeJSONResponse({"detail": f"the index cannot be read: {exc}"}, status_code=503)
    return SafeJSONResponse({"detail": f"{type(exc).__name__}: {exc}"}, status_code=500)


async def _library_error(request: Request, exc: Exception) -> SafeJSONResponse:
    return library_error(request, exc)


async def _http_error(request: Request, exc: Exception) -> SafeJSONResponse:
    if not isinstance(exc, StarletteHTTPException):
        raise TypeError(f"unexpected exception {exc!r}")
    detail = exc.detail
    if isinstance(exc.__cause__, RecursionError):
        # FastAPI answers 400 "error parsing the body" for any parser failure; this one is
        # JSON nested deeper than Python's parser goes (it recurses once per level).
        detail = "the JSON body nests arrays or objects too deeply to be read"
    return SafeJSONResponse({"detail": detail}, status_code=exc.status_code, headers=exc.headers)


async def _validation_error(request: Request, exc: Exception) -> SafeJSONResponse:
    if not isinstance(exc, RequestValidationError):
        raise TypeError(f"unexpected exception {exc!r}")
    errors = [_without_big_input(e) for e in exc.errors()]
    return SafeJSONResponse({"detail": jsonable_encoder(errors)}, status_code=422)


# Largest input an error echoes back, as JSON-ish size and nesting depth. Anything bigger is
# described instead: echoing a whole body back is no help, and the encoders recurse per level.
_ECHO_MAX_SIZE = 1000
_ECHO_MAX_DEPTH = 8


def _without_big_input(error: Any) -> Any:
    """An error of the list with its 'input' echoed only when small (NaN/inf spelled out)."""
    if not isinstance(error, dict) or "input" not in error:
        return error
    value = error["input"]
    shape = json_shape(value)
    if shape.size > _ECHO_MAX_SIZE or shape.depth > _ECHO_MAX_DEPTH:
        kind = "an object" if isinstance(value, dict) else "an array" if shape.depth else "a value"
        echo: Any = f"(not shown: {kind} about {shape.size:,} long, {shape.depth} levels deep)"
    else:
        echo = jsonable_encoder(value)
        if shape.non_finite:
            echo = spell_non_finite(echo)
    return {**error, "input": echo}


def install_handlers(app: FastAPI) -> None:
    """Register the error handlers (FastAPI's {"detail": ...} shape throughout)."""
    app.add_exception_handler(RetrieverError, _library_error)
    app.add_exception_handler(RerankerError, _library_error)
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(RequestValidationError, _validation_error)


# Given an admin request's Authorization header: the refusal to send, or None to let it in.
AdminGate = Callable[[str | None], StarletteHTTPException | None]


class BodyLimitMiddleware:
    """413 for bodies over the limit, by Content-Length up front or by counting chunks.

    Admin calls may send larger bodies, but only once their token is right: the gate looks at
    the Authorization header first and refuses (401/403) before a byte of the body is read.
    """

    def __init__(
        self,
        app: ASGIApp,
        *,
        max_bytes: int,
        admin_max_bytes: int,
        admin_gate: AdminGate | None = None,
    ) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.admin_max_bytes = admin_max_bytes
        self.admin_gate = admin_gate

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        path = str(scope.get("path", ""))
        limit = self.max_bytes
        # CORS preflights carry no token and no body; they pass to the CORS middleware.
        if path.startswith("/v1/admin/") and scope.get("method") != "OPTIONS":
            if self.admin_gate is not None:
                auth = next((v for n, v in scope.get("headers", []) if n == b"authorization"), None)
                refusal = self.admin_gate(None if auth is None else auth.decode("latin-1"))
                if refusal is not None:
                    response = SafeJSONResponse(
                        {"detail": refusal.detail},
                        status_code=refusal.status_code,
                        headers=refusal.headers,
                    )
                    await response(scope, receive, send)
                    return
            limit = self.admin_max_bytes
        for name, value in scope.get("headers", []):
            if name == b"content-length":
                try:
                    length = int(value)
                except ValueError:
                    await _reject(
                        scope, receive, send, 400, "the Content-Length header is not a number"
                    )
                    return
                if length > limit:
                    await _reject(scope, receive, send, 413, _too_large(limit))
                    return
        seen = 0

        async def counting_receive() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    # FastAPI re-raises HTTPExceptions from body reading; the handler renders it.
                    raise StarletteHTTPException(413, _too_large(limit))
            return message

        await self.app(scope, counting_receive, send)


def _too_large(limit: int) -> str:
    return f"request body is larger than the limit of {limit} bytes"


async def _reject(scope: Scope, receive: Receive, send: Send, status: int, detail: str) -> None:
    await SafeJSONResponse({"detail": detail}, status_code=status)(scope, receive, send)
