"""The request parts of metadata filters and snippets (kept apart from api/schemas.py)."""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import AfterValidator, BaseModel, ConfigDict, Field

MAX_FILTER_FIELDS = 32  # conditions one filter may hold (a cap on work, common practice, no source)

FILTER_DESCRIPTION = (
    "keep only articles whose metadata match every condition, chosen before the top-k cut "
    "(so fewer than k candidates may come back, never a filtered-out one). Per field: a "
    'value for equality ({"kind": "town"}), {"in": [values]} for membership, {"eq": value}, '
    'or number bounds gt, gte, lt, lte ({"year": {"gte": 1800, "lt": 1900}}). An article '
    "lacking the field matches no condition on it. An unknown field or a value of the wrong "
    "type is a 422 naming the field"
)
FILTER_EXAMPLE = {"kind": {"in": ["town", "river"]}, "year": {"gte": 1800}}


def _bounded(value: dict[str, Any]) -> dict[str, Any]:
    if len(value) > MAX_FILTER_FIELDS:
        raise ValueError(f"must hold at most {MAX_FILTER_FIELDS} fields (got {len(value)})")
    return value


MetadataFilter = Annotated[dict[str, Any], AfterValidator(_bounded)]


class FilterOptions(BaseModel):
    """What a rank request adds for filters and snippets (mixed into the rank requests)."""

    model_config = ConfigDict(extra="forbid", strict=True)

    filter: MetadataFilter | None = Field(
        default=None, description=FILTER_DESCRIPTION, examples=[FILTER_EXAMPLE]
    )
    snippet: bool = Field(
        default=False,
        description="add to each candidate a passage of its text (at most 240 characters, "
        "cut at word boundaries, '…' where cut) around the clue's matched words",
    )
