"""Request and response models of the daemon's HTTP API.

FastAPI builds the OpenAPI document from these, so each constraint written here is both enforced
(a request that breaks one gets 400) and published (a client or a property-based tester reads it
from /api/openapi.json). What the schema cannot say - whether a sequence text is a valid sequence
for this instrument, whether a name is a shipped sequence - the daemon checks and refuses with 422.
"""

from __future__ import annotations

import math
import re
from datetime import datetime
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    StrictFloat,
    StrictInt,
    StrictStr,
    StringConstraints,
    WithJsonSchema,
)

from pycnoctl.controller.record.catalog import STATUSES

RUN_ID_PATTERN = r"^R\d{8}T\d{6}Z-[0-9a-f]{6}$"
# a mass or volume as text: a positive number and, optionally, one of the units the dashboard offers
_QTY = r"^\s*(\d{1,9}(\.\d{0,9})?|\.\d{1,9})([eE][-+]?\d{1,2})?\s*{units}\s*$"
MASS_PATTERN = _QTY.replace("{units}", "(mg|g|kg)?")
VOLUME_PATTERN = _QTY.replace("{units}", r"(mm\^3|cm\^3|mL|ml|m\^3)?")

RunStatus = Literal["queued", "running", "completed", "fault", "aborted", "interrupted", "cancelled"]
assert set(RunStatus.__args__) == set(STATUSES)  # type: ignore[attr-defined]  # one list of statuses

# names and IDs are plain text, a note may run over lines (controller/domain/text.py says why)
# (as patterns, so the published schema says it too)
Text200 = Annotated[str, StringConstraints(max_length=200, pattern=r"^[^\x00-\x1f\x7f-\x9f]*$")]
Note200 = Annotated[str, StringConstraints(max_length=200, pattern=r"^[^\x00-\x08\x0b-\x1f\x7f-\x9f]*$")]


def _iso_only(v: object) -> object:
    """pydantic also reads a bare number as a Unix time; the API publishes ISO 8601 only, so it takes only that."""
    if isinstance(v, str) and not re.match(r"\d{4}-\d{2}-\d{2}", v):
        raise ValueError("a time must be ISO 8601, e.g. 2025-03-14T10:15:00Z")
    return v


Instant = Annotated[datetime, BeforeValidator(_iso_only)]


def _quantity(pattern: str, what: str, example: str) -> Any:
    """A positive number (in the default unit) or a text with a unit; one readable refusal for both forms."""
    rx = re.compile(pattern)

    def check(v: float | str) -> float | str:
        ok = rx.fullmatch(v) if isinstance(v, str) else math.isfinite(v) and v > 0
        if not ok:
            raise ValueError(f"{what} must be a positive number, with or without a unit, e.g. {example!r}")
        return v

    schema = {"anyOf": [{"type": "number", "exclusiveMinimum": 0}, {"type": "string", "pattern": pattern}]}
    return Annotated[StrictFloat | StrictInt | StrictStr, AfterValidator(check), WithJsonSchema(schema)]


Mass = _quantity(MASS_PATTERN, "a mass", "19.62 g")
Volume = _quantity(VOLUME_PATTERN, "a volume", "6 cm^3")


class Error(BaseModel):
    """Every refusal: a sentence for people, the status again, and file:line:col problems if any."""

    model_config = ConfigDict(extra="allow")
    error: str
    status: int
    problems: list[str] | None = None


class RunRequest(BaseModel):
    """A run to queue: exactly one of a shipped sequence's name or a sequence's YAML text (never a path)."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "oneOf": [{"required": ["sequence"], "not": {"required": ["sequence_text"]}},
                  {"required": ["sequence_text"], "not": {"required": ["sequence"]}}]})
    # text, not null, when present: "oneOf" counts a key that is there, so a null would pass as a second one
    sequence: Annotated[str, StringConstraints(min_length=1, max_length=200)] = Field(  # type: ignore[assignment]
        None, description="name of a shipped sequence (GET /api/sequences), e.g. quick-demo")
    sequence_text: Annotated[str, StringConstraints(min_length=1, max_length=16 * 1024)] = Field(  # type: ignore[assignment]
        None, description="the YAML text of a sequence: at most 16384 characters, so at most 64 KiB of UTF-8; "
                          "the whole body must also fit in 64 KiB (413 otherwise)")
    sample_id: Text200 = ""
    mass: Mass | None = Field(None, description="specimen mass, '19.62 g' (a number is grams)")
    u_mass: Mass | None = Field(None, description="standard uncertainty of the mass (default 0.1 mg)")
    bulk_volume: Volume | None = Field(None, description="envelope volume ('6 cm^3'; a number is cm^3)")
    u_bulk_volume: Volume | None = Field(None, description="standard uncertainty of the envelope volume "
                                                           "('0.02 cm^3'; a number is cm^3)")
    operator: Text200 = ""
    expansion_volume: Annotated[str, StringConstraints(min_length=1, max_length=100)] | None = Field(
        None, description="override the sequence's choice of expansion volume")
    note: Note200 = ""


class Submitted(BaseModel):
    run_id: str = Field(pattern=RUN_ID_PATTERN)
    sequence: str
    kind: str
    expansion_volume: str | None
    warnings: list[str]
    expected_s: float


class Run(BaseModel):
    """One catalog row (people's units, as the dashboard shows them); ``summary`` and ``links`` for one run."""

    run_id: str
    created: str | None
    status: RunStatus
    sample_id: str | None
    sequence: str | None
    kind: str | None
    started: str | None
    ended: str | None
    volume_cm3: float | None
    volume_u_cm3: float | None
    density_g_cm3: float | None
    mass_g: float | None
    message: str | None
    summary: dict[str, Any] | None = None
    record_problems: list[str] | None = None  # e.g. a damaged summary.json: why ``summary`` is missing
    links: dict[str, str] | None = None


class RunList(BaseModel):
    runs: list[Run]


class QueueItem(BaseModel):
    position: int  # 1 for the run that starts next
    run_id: str
    sequence: str
    sample_id: str | None
    operator: str | None
    mass_g: float | None


class QueueState(BaseModel):
    length: int
    paused: bool
    paused_reason: str | None


class Queue(QueueState):
    items: list[QueueItem]


class Status(BaseModel):
    """The daemon's snapshot; the keys a client relies on are named, the rest passes through."""

    model_config = ConfigDict(extra="allow")
    state: str
    activity: str
    pressure: dict[str, Any]
    valves: dict[str, bool]
    interlock: dict[str, Any]
    current_run: dict[str, Any] | None
    last_run: dict[str, Any] | None
    queue: QueueState
    instrument: dict[str, Any]
    loop: dict[str, Any]
    events_seq: int


class Trace(BaseModel):
    t: list[float | None]
    gauge_pa: list[float | None]
    state: list[str] = Field(description="the run state at each point (GET /api/states names them)")


class Sequences(BaseModel):
    sequences: list[str]


class StateInfo(BaseModel):
    """One run state as people see it (controller.domain.states)."""

    name: str
    label: str
    colour: str = Field(pattern=r"^#[0-9a-f]{6}$")
    terminal: bool


class Removed(BaseModel):
    removed: str


class Aborting(BaseModel):
    aborting: bool


class ResetDone(BaseModel):
    reset: bool
    message: str
    interlock: dict[str, Any]
