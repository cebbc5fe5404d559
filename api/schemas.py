"""Request and response bodies of the JSON API (pydantic v2 models; they make the OpenAPI)."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    model_validator,
)

from .jsonshape import json_shape
from .schemas_filter import FilterOptions

REQUEST_ID_MAX = 64
MAX_METADATA_DEPTH = 32


def _valid_text(value: str) -> str:
    # A lone surrogate (legal in a JSON \u escape) cannot be encoded as UTF-8 later on.
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError("must be valid Unicode text (no lone surrogate escapes)") from exc
    return value


def _non_blank(value: str) -> str:
    if not value.strip():
        raise ValueError("must contain at least one non-space character")
    return value


def _plain_json(value: Any) -> Any:
    shape = json_shape(value)
    # Python's JSON parser accepts NaN and Infinity, which no JSON reply could carry back.
    if shape.non_finite:
        raise ValueError("must not contain NaN or infinite numbers")
    # The value is stored in the served log and read back by training; deep nesting there
    # only makes every later reader recurse. (A fixed cap is common practice, no source.)
    if shape.depth > MAX_METADATA_DEPTH:
        raise ValueError(
            f"must not nest arrays or objects more than {MAX_METADATA_DEPTH} levels deep"
        )
    return value


Text = Annotated[str, AfterValidator(_valid_text)]
Clue = Annotated[str, AfterValidator(_valid_text), AfterValidator(_non_blank)]
ArticleId = Annotated[
    str,
    StringConstraints(min_length=1, max_length=1000),
    AfterValidator(_valid_text),
    AfterValidator(_non_blank),
]
FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


class _Strict(BaseModel):
    # Strict: JSON types are not coerced (false is not 0, "5" is not 5), as the schema says.
    model_config = ConfigDict(extra="forbid", strict=True)


class PayoffIn(_Strict):
    """What a right answer gains and a wrong one costs; sets the answer threshold."""

    reward: FiniteFloat = Field(default=1.0, gt=0, le=1e6, description="gain of a right answer")
    penalty: FiniteFloat = Field(default=1.0, ge=0, le=1e6, description="cost of a wrong answer")


class _RankOptions(FilterOptions, _Strict):
    k: int | None = Field(
        default=None,
        ge=1,
        description="candidates to return (server default); with a model, at most the model's "
        "k: probabilities are always computed over the model's k candidates, k only cuts the reply",
    )
    include_features: bool = Field(default=False, description="add each candidate's features")
    explain: bool = Field(
        default=False,
        description="add each candidate's explanation: every feature's raw and scaled value "
        "and its contribution to the logit, the intercept, and how the probabilities follow",
    )
    payoff: PayoffIn | None = Field(default=None, description="overrides the model's threshold")
    complete: bool = Field(
        default=False, description="the clue is finished: no more words are coming"
    )
    revealed: FiniteFloat | None = Field(
        default=None,
        gt=0,
        le=1,
        description="share of the whole clue these words are, in (0, 1]: picks the model's "
        "threshold for that share; without it, the whole-clue threshold",
    )

    @model_validator(mode="after")
    def _complete_is_all_revealed(self) -> _RankOptions:
        if self.complete and self.revealed is not None and self.revealed != 1:
            raise ValueError("revealed must be 1 (or left out) when complete is true")
        return self


class RankRequest(_RankOptions):
    """One clue to rank."""

    clue: Clue = Field(description="free-text clue, possibly still incomplete")
    metadata: Annotated[dict[str, Any], AfterValidator(_plain_json)] | None = Field(
        default=None, description="values for a model's metadata features (kept in the log)"
    )


class BatchRankRequest(_RankOptions):
    """Many clues ranked with the same options."""

    clues: list[Clue] = Field(min_length=1, description="clues to rank, answered in order")


class FeaturePartOut(BaseModel):
    """One feature's part in a candidate's logit."""

    name: str
    value: float | None = Field(description="the feature's value for this candidate")
    scaled: float | None = Field(description="(value - mean) / scale, as the model standardizes")
    coefficient: float
    contribution: float | None = Field(description="coefficient * scaled: its part of the logit")


class ExplanationOut(BaseModel):
    """How the model reached a candidate's probability."""

    features: list[FeaturePartOut] = Field(description="by absolute contribution, largest first")
    intercept: float
    logit: float = Field(description="intercept + the contributions' sum")
    raw_probability: float = Field(description="1 / (1 + exp(-logit))")
    calibration: str = Field(
        description="the calibrator between raw_probability and pointwise: none, platt or isotonic"
    )
    pointwise: float = Field(description="raw_probability after the calibrator")
    how: str = Field(description="the steps in words, down to the served probability")


class CandidateOut(BaseModel):
    """One candidate article."""

    id: str
    title: str
    qualifier: str = Field(description="parenthetical part of the title, '' if none")
    score: float = Field(description="BM25 score")
    rank: int = Field(description="1-based BM25 rank")
    probability: float | None = Field(
        description="its share of the clue's distribution: P(this candidate is the answer); "
        "the candidates' shares and none_of_these sum to 1; null without a model"
    )
    pointwise: float | None = Field(
        default=None,
        description="the candidate model's own calibrated probability, before the clue's "
        "distribution shares it out; null without a model",
    )
    features: dict[str, float | None] | None = Field(
        default=None, description="feature values (only when include_features is true)"
    )
    explanation: ExplanationOut | None = Field(
        default=None, description="only when explain is true and a model is loaded"
    )
    snippet: str | None = Field(default=None, description="its text around the clue's words")


class DecisionOut(BaseModel):
    """Answer now, wait for more words, or (complete clues only) abstain."""

    action: Literal["answer", "wait", "abstain"]
    id: str | None = Field(description="chosen article id when action is 'answer'")
    probability: float | None
    threshold: float = Field(description="probability an answer had to reach")
    threshold_basis: Literal["payoff", "share", "whole_clue", "single", "default"] = Field(
        description="where the threshold came from: the request's payoff, the model's "
        "threshold for the share revealed, its whole-clue threshold (no share given), its "
        "single threshold (a model without a schedule), or 0.5 without a model"
    )
    reason: str = Field(description="why this action, and why this threshold")


class TimingOut(BaseModel):
    """Server-side time spent, in milliseconds."""

    rank_ms: float = Field(description="search, features and model")
    total_ms: float = Field(description="whole handler, including logging")


class RankResult(BaseModel):
    """Candidates and decision for one clue."""

    request_id: str = Field(description="send it back with POST /v1/feedback")
    clue: str
    candidates: list[CandidateOut]
    decision: DecisionOut
    in_candidates: float | None = Field(
        default=None,
        description="P(the answer is among the model's k candidates); null without a model",
    )
    none_of_these: float | None = Field(
        default=None,
        description="P(none of the model's k candidates is the answer) = 1 - in_candidates",
    )


class RankedHow(BaseModel):
    """What a single and a batch reply both say about how they were ranked."""

    k: int = Field(description="candidates asked for (at most this many are returned)")
    model_k: int | None = Field(
        description="candidates the probabilities were computed over (the model's k); "
        "null without a model"
    )
    complete: bool
    revealed: float | None = Field(default=None, description="the share revealed, as sent")
    ranked_by: Literal["probability", "bm25"]
    note: str | None = Field(default=None, description="set when no model is loaded")
    filter: dict[str, Any] | None = Field(default=None, description="the metadata filter used")
    index_version: str
    model_version: str | None
    timing: TimingOut


class RankResponse(RankedHow, RankResult):
    """Reply to POST /v1/rank."""


class BatchRankResponse(RankedHow):
    """Reply to POST /v1/rank/batch: one result per clue, in order."""

    results: list[RankResult]


class FeedbackRequest(_Strict):
    """The right answer to a ranked clue, or null for 'none of these'."""

    request_id: Annotated[str, StringConstraints(max_length=REQUEST_ID_MAX)]
    answer: ArticleId | None = Field(
        description="article id (a title or alias naming one article is resolved to its id), "
        "or null: none of the candidates"
    )


class FeedbackResponse(BaseModel):
    """Feedback accepted."""

    request_id: str
    answer: str | None
    recorded: bool = Field(description="false when the server keeps no served log")


class EntryOut(BaseModel):
    """One article's stored fields and what the index derived from them."""

    id: str
    title: str
    base: str
    qualifier: str
    text: str
    links: list[str]
    aliases: list[str]
    popularity: float | None
    inlinks: int
    metadata: dict[str, Any]


class ArticleIn(_Strict):
    """An article in the corpus record shape."""

    id: ArticleId
    title: Annotated[Text, StringConstraints(min_length=1, max_length=1000)]
    text: Text
    links: list[Text] = Field(default_factory=list)
    aliases: list[Text] = Field(default_factory=list)
    popularity: FiniteFloat | None = Field(default=None, ge=0)
    metadata: Annotated[dict[str, Any], AfterValidator(_plain_json)] = Field(default_factory=dict)


class ChangeOut(BaseModel):
    """What an admin call changed."""

    generation: int = Field(description="sibling workers load the files when they see it")
    index_version: str
    model_version: str | None
    previous_index_version: str
    previous_model_version: str | None
    articles: int


class LimitsOut(BaseModel):
    """Bounds on requests."""

    default_k: int = Field(description="k when a request gives none (capped at model_k)")
    max_k: int = Field(description="largest k a request may ask for (with a model: and model_k)")
    model_k: int | None = Field(
        description="the model's k: candidates its probabilities are computed over; "
        "null without a model"
    )
    max_clue_chars: int
    max_batch: int
    max_body_bytes: int


class InfoOut(BaseModel):
    """What this server serves."""

    index_version: str
    model_version: str | None
    ranked_by: Literal["probability", "bm25"]
    features: list[str]
    articles: int
    terms: int
    generation: int
    loaded_at: str
    served_log: bool
    admin_enabled: bool
    worker_pid: int = Field(description="process id of the worker that answered")
    limits: LimitsOut


class ErrorOut(BaseModel):
    """FastAPI's error shape: a message, or a list of field errors."""

    detail: Any


class HealthOut(BaseModel):
    """Liveness."""

    status: Literal["ok"]


class ReadyOut(BaseModel):
    """Readiness: the index, and the model if one was configured, are loaded."""

    ready: bool
    status: Literal["ready", "degraded", "starting"] = Field(
        default="ready",
        description="degraded: serving, but the served log cannot be written (see log_error)",
    )
    index_version: str | None
    model_version: str | None
    model_configured: bool
    log_error: str | None = Field(
        default=None, description="why the last served-log write failed; null when it works"
    )
