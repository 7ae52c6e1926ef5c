"""Request and response bodies of the HTTP API (pydantic), validated at the edge.

Session ids are opaque to the service: 1-128 characters from SESSION_ID_CHARS (letters, digits and
`-_.:`), so they are safe in store keys, logs and URLs without escaping.
"""

from __future__ import annotations

import re
from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, StrictBool, StringConstraints, field_validator

SESSION_ID_PATTERN = r"^[A-Za-z0-9._:-]+$"
SESSION_ID_CHARS = "letters, digits and - _ . :"
SESSION_ID_MAX = 128
_SESSION_ID = re.compile(SESSION_ID_PATTERN)


def is_session_id(value: str) -> bool:
    """The session-id rule both click entrances apply (the route's path parameter declares the same)."""
    return 0 < len(value) <= SESSION_ID_MAX and _SESSION_ID.match(value) is not None


ITEM_ID_MAX = 256
EVENT_ID_MAX = 128
COUNT_MIN, COUNT_MAX = 1, 100
BUDGET_MIN, BUDGET_MAX = 1, 10_000


def _integral(value: Any) -> int:
    """An integer, or a float with no fractional part (JSON Schema's "integer" accepts 244.0, JSON
    Schema 2020-12 validation, section 6.1.1); never a bool or a string."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError("Input should be a valid integer")
    if isinstance(value, float):
        if not value.is_integer():
            raise ValueError("Input should be a valid integer, without a fractional part")
        return int(value)
    return value


# Integers that every JSON parser reads exactly: |n| <= 2**53 - 1 (I-JSON, RFC 7493 section 2.2).
# Larger ids are sent as strings.
_SafeInt = Annotated[int, Field(ge=-(2**53 - 1), le=2**53 - 1), BeforeValidator(_integral)]
ItemId = Annotated[str, StringConstraints(strict=True, min_length=1, max_length=ITEM_ID_MAX)] | _SafeInt
EventId = Annotated[str, StringConstraints(strict=True, min_length=1, max_length=EVENT_ID_MAX)] | _SafeInt
Count = Annotated[int, Field(ge=COUNT_MIN, le=COUNT_MAX, description="items to return"), BeforeValidator(_integral)]
BudgetMs = Annotated[int, Field(ge=BUDGET_MIN, le=BUDGET_MAX, description="time budget of this request in ms"), BeforeValidator(_integral)]


class ClickRequest(BaseModel):
    """One click of a visit."""

    model_config = ConfigDict(extra="forbid")

    item_id: ItemId = Field(description="the clicked item; an integer is taken as its decimal string")
    event_id: EventId | None = Field(None, description="client id of this click; a replayed one is not applied twice")
    count: Count | None = None
    exclude_seen: StrictBool | None = Field(
        None, description="leave out items the visit has clicked; unset: the artifact's serving default (true unless its evaluation chose otherwise)"
    )
    budget_ms: BudgetMs | None = None

    @field_validator("item_id", "event_id", mode="after")
    @classmethod
    def _as_text(cls, value: str | int | None) -> str | None:
        return None if value is None else str(value)


class ScoredItem(BaseModel):
    item_id: str
    score: float


class RecommendationAnswer(BaseModel):
    session_id: str
    items: list[ScoredItem]
    served_by: str = Field(description="gru, session-knn, neighbours or popularity")
    artifact: str = Field(description="name/version of the artifact that answered")
    fallback_reason: str | None = Field(
        description=(
            "why the active recommender did not answer: unknown_item, no_history, budget (the model would not fit in "
            "what was left of the budget), deadline (it ran past it), model_unavailable (its circuit breaker is open), "
            "model_error (this call failed), store_unavailable (the session store failed, timed out or its breaker is open)"
        )
    )
    elapsed_ms: float
    sequence: int = Field(description="clicks this visit has applied; 0 when this click is not known to be recorded")
    duplicate: bool = Field(False, description="true when the click's event_id was applied before; nothing was applied now")
    recorded: Literal["yes", "no", "unknown"] = Field(
        description="is this click in the session store: yes; no (nothing written; a GET records nothing); "
        "unknown (the write was sent, its answer did not come in time: retry with the same event_id)"
    )
    arm: str | None = Field(None, description="the visit's experiment arm; present only while an experiment runs (CAIRN_EXPERIMENT)")


class ServingChoiceBody(BaseModel):
    model_config = ConfigDict(extra="forbid")

    name: Annotated[str, StringConstraints(strict=True, pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")]
    version: Annotated[str, StringConstraints(strict=True, pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")]
    recommender: Annotated[str, StringConstraints(strict=True, pattern=r"^(gru|neighbours|popularity|session-knn)$")] | None = Field(
        None, description="gru, neighbours, popularity or session-knn; unset: keep the current one"
    )
    arm: Annotated[str, StringConstraints(strict=True, pattern=r"^[A-Za-z0-9][A-Za-z0-9_-]{0,31}$")] | None = Field(
        None, description="while an experiment runs: the arm to switch (required then); without one: leave it out"
    )


class ServingAnswer(BaseModel):
    name: str
    version: str
    recommender: str
    artifact: str = Field(description="name/version, as answers carry it")
    scoring: str = Field(description="how this worker's GRU ranks the items: exact, fp16, int8, int4, int4+int8 or clustered (CAIRN_SCORING as resolved for the artifact)")
    small_batch_rows: int | None = Field(
        None, description="int4+int8: scoring passes of up to this many clicks read the int4 table, larger ones int8 (timed when this worker loaded the model)"
    )


class SwitchAnswer(ServingAnswer):
    arm: str | None = Field(None, description="the experiment arm switched; present only while an experiment runs")


class ArtifactEntry(BaseModel):
    name: str
    version: str
    verified: bool = Field(description="checksums, format and manifest match (what the listing checks)")
    loadable: bool | None = Field(
        description="whether this worker could load it (tables and step graph, as a switch does); null: not tried here"
    )
    problem: str | None
    active: bool
    created_at: str | None
    data_fingerprint: str | None
    metrics: dict[str, Any]
    hyperparameters: dict[str, Any]


class WorkerServing(BaseModel):
    worker: str = Field(description="host:pid")
    artifact: str
    recommender: str
    seen_s_ago: float = Field(description="seconds since the worker last reported")


class ArtifactsAnswer(BaseModel):
    active: ServingAnswer
    artifacts: list[ArtifactEntry]
    workers: list[WorkerServing] = Field(description="what each worker sharing the session store serves")


class ErrorAnswer(BaseModel):
    error: str
    message: str
    field: str | None
    status: int
