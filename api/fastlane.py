"""POST /v1/rank without FastAPI's per-request machinery, for requests that need none of it.

A profile of the server under load (cProfile on a CPU clock, 100k articles, BM25 model) put
about a third of its CPU per /v1/rank request in FastAPI and Starlette between the middleware
and the endpoint: resolving the endpoint's dependencies, reading the content type through
`email.message`, parsing the body with the standard `json` module and then validating the
resulting dict, the exception middleware and the router's matching. For a well-formed JSON
request none of that decides anything, so this innermost middleware takes such a request
itself: the body is parsed and validated in one pass by pydantic-core
(`RankRequest.model_validate_json`) and handed to the same function the FastAPI route calls
(`routes.rank_now`).

Everything else goes the usual way, through FastAPI, with the body replayed, so every error
reply keeps FastAPI's exact shape: another path or method, a content type other than
`application/json`, an empty body, a body the model refuses or that is not JSON, and a
server still starting. The route stays declared in FastAPI (the OpenAPI schema is unchanged);
the outer middleware (metrics, body limit, CORS) run as before; an error raised while
ranking (a clue too long, a bad filter, ...) is answered by the application's own exception
handler for it, as Starlette's exception middleware would, and any other goes up to the
server-error middleware as before.
"""

from __future__ import annotations

from fastapi import FastAPI, Request
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from . import schemas as s
from .routes import rank_now, router

PATH = "/v1/rank"
_JSON = b"application/json"


def _json_content(headers: list[tuple[bytes, bytes]]) -> bool:
    """True when the Content-Type is application/json, alone or with parameters."""
    for name, value in headers:
        if name == b"content-type":
            kind = value.split(b";", 1)[0].strip().lower()
            return kind == _JSON
    return False


def _route() -> BaseRoute | None:
    """The declared route (its `path` labels the metrics, as when the router matched it)."""
    for route in router.routes:
        if getattr(route, "path", None) == PATH and "POST" in getattr(route, "methods", ()):
            return route
    return None


class RankFastLane:
    """Takes well-formed POST /v1/rank requests (see the module's docstring)."""

    def __init__(self, app: ASGIApp, *, fastapi_app: FastAPI) -> None:
        self.app = app
        self.fastapi_app = fastapi_app
        self._route: BaseRoute | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if (
            scope["type"] != "http"
            or scope.get("method") != "POST"
            or scope.get("path") != PATH
            or not _json_content(scope.get("headers", []))
            or self.fastapi_app.dependency_overrides  # tests replacing a dependency
        ):
            await self.app(scope, receive, send)
            return
        try:
            body, last = await _read_body(receive)
        except StarletteHTTPException as exc:  # the body limit's 413, as FastAPI would answer
            await self._handled(exc, scope, receive, send)
            return
        runtime = getattr(self.fastapi_app.state, "runtime", None)
        request: s.RankRequest | None = None
        if body and runtime is not None:
            try:
                request = s.RankRequest.model_validate_json(body)
            except ValueError:  # pydantic's ValidationError is one
                request = None
        if request is None or runtime is None:
            await self.app(scope, _replay(body, last, receive), send)
            return
        if self._route is None:
            self._route = _route()
        scope["route"] = self._route  # the metrics' label, as the router sets it
        try:
            response = await rank_now(request, runtime, self.fastapi_app.state.settings)
        except Exception as exc:  # as Starlette's exception middleware: a handler, or up
            await self._handled(exc, scope, receive, send)
            return
        await response(scope, receive, send)

    async def _handled(self, exc: Exception, scope: Scope, receive: Receive, send: Send) -> None:
        """Answer with the application's handler for `exc` (its class or nearest base)."""
        handlers = self.fastapi_app.exception_handlers
        for cls in type(exc).__mro__:
            handler = handlers.get(cls)
            if handler is not None:
                response = await handler(Request(scope, receive), exc)  # type: ignore[misc]
                await response(scope, receive, send)
                return
        raise exc


async def _read_body(receive: Receive) -> tuple[bytes, Message | None]:
    """The whole request body, and the message that ended it early (a disconnect), if any."""
    chunks: list[bytes] = []
    while True:
        message = await receive()
        if message["type"] != "http.request":
            return b"".join(chunks), message
        chunks.append(message.get("body", b""))
        if not message.get("more_body", False):
            return b"".join(chunks), None


def _replay(body: bytes, last: Message | None, receive: Receive) -> Receive:
    """A receive that gives the body already read, then whatever the client sends next."""
    pending: list[Message] = [{"type": "http.request", "body": body, "more_body": False}]
    if last is not None:
        pending = [{"type": "http.request", "body": body, "more_body": True}, last]

    async def again() -> Message:
        if pending:
            return pending.pop(0)
        return await receive()

    return again


def install(app: FastAPI) -> None:
    """Add the fast lane as the innermost middleware (call before adding the others)."""
    app.add_middleware(RankFastLane, fastapi_app=app)


__all__ = ["RankFastLane", "install"]
