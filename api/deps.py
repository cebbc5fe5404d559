"""Per-process runtime (serving state, request ids, served log, metrics) and its dependencies."""

from __future__ import annotations

import hmac
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from fastapi import Depends, HTTPException, Request
from fastapi.exceptions import RequestValidationError
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from fastapi.security.utils import get_authorization_scheme_param

from retriever import Index, load_index

from .metrics import Metrics
from .requestids import RequestIds, shared_secret
from .servedlog import ServedLog
from .settings import ServiceSettings, get_settings
from .state import Serving

_log = logging.getLogger("hunchwise.service")

bearer = HTTPBearer(
    auto_error=False,
    description="the admin token (HUNCHWISE_ADMIN_TOKEN or the --admin-token-file)",
)


@dataclass
class Runtime:
    """Everything one worker process holds while it serves."""

    settings: ServiceSettings
    serving: Serving
    ids: RequestIds
    served_log: ServedLog | None
    metrics: Metrics
    admin_token: str | None
    log_error: str | None = None  # why the last served-log write failed; None once one works

    @classmethod
    def start(
        cls,
        settings: ServiceSettings,
        metrics: Metrics,
        *,
        resume: bool = False,
        open_index: Callable[[Path], Index] = load_index,
    ) -> Runtime:
        """Load the index and model, open the served log, start the reload watcher.

        resume: start from the last good files in the state folder (see `Serving`).
        open_index: how an index folder is opened (see `Serving`).
        """
        token = settings.resolved_admin_token()
        secret = settings.request_secret.get_secret_value() if settings.request_secret else None
        ids = RequestIds(shared_secret(secret, settings.state_dir))
        serving = Serving(settings, resume=resume, open_index=open_index)
        log = None
        if settings.log_dir is not None:
            log = ServedLog(
                settings.log_dir,
                max_bytes=settings.log_max_bytes,
                backups=settings.log_backups,
                fsync=settings.log_fsync,
            )
        serving.start()
        return cls(settings, serving, ids, log, metrics, token)

    def close(self) -> None:
        """Stop the watcher and flush the served log."""
        self.serving.stop()
        if self.served_log is not None:
            self.served_log.close()


async def get_runtime(request: Request) -> Runtime:
    """Dependency: this process's runtime; 503 while the server is still starting.

    `async` so that FastAPI calls it on the event loop, not through the thread pool."""
    runtime: Runtime | None = getattr(request.app.state, "runtime", None)
    if runtime is None:
        raise HTTPException(503, "the server is starting: index and model are not loaded yet")
    return runtime


RuntimeDep = Annotated[Runtime, Depends(get_runtime)]
SettingsDep = Annotated[ServiceSettings, Depends(get_settings)]


def log_records(runtime: Runtime, records: list[dict[str, Any]], *, feedback: bool = False) -> bool:
    """Append to the served log; on failure count it, remember why, and return False.

    Policy: ranking never fails because the log cannot be written (the reply is served,
    /metrics counts the failure, /readyz says "degraded"); a label that cannot be stored is
    the caller's to refuse, so the client can send it again.
    """
    log = runtime.served_log
    if log is None:
        return False
    try:
        if feedback:
            log.append_feedback(records)
        else:
            log.append(records)
    except OSError as exc:
        runtime.metrics.log_failures.inc()
        runtime.log_error = f"{exc.strerror or exc} ({exc.filename or log.folder})"
        _log.warning("served log not written: %s", runtime.log_error)
        return False
    runtime.log_error = None
    return True


async def require_feedback_token(
    runtime: RuntimeDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> None:
    """Dependency: with a feedback token configured, POST /v1/feedback must carry it."""
    secret = runtime.settings.feedback_token
    if secret is None:
        return
    given = (credentials.credentials if credentials else "").encode("utf-8")
    if not hmac.compare_digest(given, secret.get_secret_value().strip().encode("utf-8")):
        raise HTTPException(
            401,
            "feedback needs the feedback token: send 'Authorization: Bearer <token>'",
            headers={"WWW-Authenticate": "Bearer"},
        )


def admin_refusal(expected: str | None, authorization: str | None) -> HTTPException | None:
    """Why an admin call with this Authorization header is refused; None when it may go on.

    Reads only the header, so the body-limit middleware calls it before any body is read
    (an unauthenticated caller cannot make a worker buffer an admin-sized body).
    """
    if expected is None:
        return HTTPException(
            403,
            "admin endpoints are disabled: start the server with HUNCHWISE_ADMIN_TOKEN "
            "or --admin-token-file to enable them",
        )
    scheme, given = get_authorization_scheme_param(authorization)  # as HTTPBearer parses it
    if not authorization or scheme.lower() != "bearer" or not given:
        return HTTPException(
            401,
            "missing admin token: send 'Authorization: Bearer <token>'",
            headers={"WWW-Authenticate": "Bearer"},
        )
    if not hmac.compare_digest(given.encode("utf-8"), expected.encode("utf-8")):
        return HTTPException(401, "wrong admin token", headers={"WWW-Authenticate": "Bearer"})
    return None


def require_admin(
    request: Request,
    runtime: RuntimeDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> None:
    """Dependency: allow the call only with the right bearer token; admin is off without one."""
    # `credentials` puts the bearer scheme into the OpenAPI document; the check reads the
    # header itself, exactly as the body-limit middleware did before the body was read.
    refusal = admin_refusal(runtime.admin_token, request.headers.get("authorization"))
    if refusal is not None:
        raise refusal


def field_error(
    loc: Sequence[str | int], msg: str, kind: str = "value_error", **ctx: Any
) -> RequestValidationError:
    """A 422 in FastAPI's own error shape, for checks that depend on the settings."""
    error: dict[str, Any] = {"type": kind, "loc": tuple(loc), "msg": msg}
    if ctx:
        error["ctx"] = ctx
    return RequestValidationError([error])


def check_clue(clue: str, settings: ServiceSettings, loc: Sequence[str | int]) -> None:
    """Reject a clue longer than the configured limit (422 naming the field)."""
    if len(clue) > settings.max_clue_chars:
        raise field_error(
            loc,
            f"String should have at most {settings.max_clue_chars} characters (got {len(clue)})",
            "string_too_long",
            max_length=settings.max_clue_chars,
        )


def check_k(k: int | None, settings: ServiceSettings, model_k: int | None = None) -> int:
    """The k to use: the request's, bounded by max_k and the model's k, or the server default.

    With a model, probabilities are computed over the model's k candidates (the sets it
    was trained on), so a request may ask for at most that many; the default is capped there.
    """
    limit = settings.max_k if model_k is None else min(settings.max_k, model_k)
    if k is None:
        return min(settings.default_k, limit)
    if k > limit:
        why = (
            f": the model's k ({model_k}) is how many candidates its probabilities are "
            "computed over"
            if model_k is not None and model_k < settings.max_k
            else ""
        )
        raise field_error(
            ("body", "k"),
            f"Input should be less than or equal to {limit}{why}",
            "less_than_equal",
            le=limit,
        )
    return k
