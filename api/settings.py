"""Service settings, read from HUNCHWISE_* environment variables (pydantic-settings)."""

from __future__ import annotations

from pathlib import Path

from fastapi import Request
from pydantic import Field, SecretStr, ValidationError, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class ServiceSettings(BaseSettings):
    """Everything `hunchwise serve` can be told; each field is also env var HUNCHWISE_<NAME>."""

    model_config = SettingsConfigDict(env_prefix="HUNCHWISE_", extra="ignore", frozen=True)

    index_dir: Path = Field(description="index folder the server searches")
    model_path: Path | None = Field(
        default=None, description="reranker model file; without one the server ranks by BM25"
    )
    user_features: list[str] = Field(
        default_factory=list,
        description="user feature functions ('package.module:function') the model was trained with",
    )
    log_dir: Path | None = Field(
        default=None, description="folder of the served log (served.jsonl); None: no log"
    )
    state_dir: Path | None = Field(
        default=None,
        description="folder the workers share: generation marker, locks, request-id secret",
    )
    admin_token: SecretStr | None = Field(default=None, description="bearer token of /v1/admin/*")
    admin_token_file: Path | None = Field(
        default=None, description="file holding the admin token (instead of HUNCHWISE_ADMIN_TOKEN)"
    )
    request_secret: SecretStr | None = Field(
        default=None,
        description="key that signs request ids; set it so feedback survives restarts",
    )

    default_k: int = Field(
        default=20,
        ge=1,
        description="candidates returned when k is omitted (capped at the model's k)",
    )
    max_k: int = Field(default=100, ge=1, description="largest k a request may ask for")
    max_clue_chars: int = Field(default=2000, ge=1, description="longest clue, in characters")
    max_batch: int = Field(default=256, ge=1, description="most clues in one batch request")
    max_body_bytes: int = Field(default=1_000_000, ge=1024, description="largest request body")
    max_admin_body_bytes: int = Field(
        default=50_000_000, ge=1024, description="largest body of POST /v1/admin/entries"
    )
    max_entries_per_call: int = Field(default=10_000, ge=1, description="articles per admin call")

    log_max_bytes: int = Field(
        default=256 * 1024 * 1024, ge=1024, description="rotate served.jsonl past this size"
    )
    log_backups: int = Field(
        default=20, ge=1, description="rotated files kept: served.1.jsonl ... served.N.jsonl"
    )
    log_features: bool = Field(
        default=False,
        description="also log every candidate's features (training recomputes them; "
        "they make the log about 6 times larger)",
    )
    log_fsync: bool = Field(
        default=False,
        description="fsync the served log after every append (survives power loss; slower)",
    )
    feedback_token: SecretStr | None = Field(
        default=None, description="when set, POST /v1/feedback needs it as a bearer token"
    )
    reload_check_seconds: float = Field(
        default=0.5, gt=0, le=60, description="how often a worker looks at the generation marker"
    )
    cors_origins: list[str] = Field(
        default_factory=list, description="origins allowed by CORS; empty: CORS off"
    )

    # Connections, per worker process (`hunchwise serve` applies them through uvicorn).
    max_connections: int = Field(
        default=1000,
        ge=1,
        le=100_000,
        description="open connections a worker keeps; one more closes (503) the one waiting "
        "longest for its request, or is refused (503) when all are busy",
    )
    request_timeout_seconds: float = Field(
        default=60,
        gt=0,
        le=3600,
        description="time a request's line, headers and body may take to arrive, from its "
        "first byte (or the connection's start); then the connection is closed (408)",
    )
    keep_alive_seconds: int = Field(
        default=5,
        ge=1,
        le=3600,
        description="idle time after a reply before a kept-alive connection is closed",
    )

    @model_validator(mode="after")
    def _check(self) -> ServiceSettings:
        if self.default_k > self.max_k:
            raise ValueError(f"default_k ({self.default_k}) exceeds max_k ({self.max_k})")
        if self.admin_token is not None and self.admin_token_file is not None:
            raise ValueError("set the admin token either in HUNCHWISE_ADMIN_TOKEN or in a file")
        if self.feedback_token is not None and not self.feedback_token.get_secret_value().strip():
            # An empty token would let every request through while looking configured.
            raise ValueError("HUNCHWISE_FEEDBACK_TOKEN is set but empty")
        return self

    def resolved_admin_token(self) -> str | None:
        """The admin token from the env or the token file; None when admin is disabled."""
        if self.admin_token is not None:
            token = self.admin_token.get_secret_value().strip()
        elif self.admin_token_file is not None:
            try:
                token = self.admin_token_file.read_text(encoding="utf-8").strip()
            except (OSError, UnicodeDecodeError) as exc:
                raise ValueError(
                    f"{self.admin_token_file}: cannot read the admin token: {exc}"
                ) from exc
            if not token:
                raise ValueError(f"{self.admin_token_file}: the admin token file is empty")
        else:
            return None
        if not token:
            raise ValueError("HUNCHWISE_ADMIN_TOKEN is set but empty")
        return token


def settings_from_env() -> ServiceSettings:
    """Settings from the HUNCHWISE_* environment; errors name the variable, never its value."""
    try:
        return ServiceSettings()  # type: ignore[call-arg]
    except ValidationError as exc:
        problems = []
        for err in exc.errors(include_input=False, include_url=False):
            name = "_".join(str(p) for p in err["loc"]).upper()
            where = f"HUNCHWISE_{name}: " if name else ""
            problems.append(where + err["msg"].removeprefix("Value error, "))
        raise ValueError("bad service settings: " + "; ".join(problems)) from None


async def get_settings(request: Request) -> ServiceSettings:
    """Dependency: the settings of the app serving this request (override it in tests).

    `async` only so that FastAPI calls it on the event loop: a plain `def` dependency is sent
    to the thread pool and back, which cost more than the lookup itself on every request."""
    settings: ServiceSettings = request.app.state.settings
    return settings
