"""Jobs, calculators and users as they appear on the wire."""

from __future__ import annotations

from datetime import datetime
from enum import StrEnum

from pydantic import BaseModel, ConfigDict, Field, JsonValue

from atomq.structure import Structure
from atomq.tasks import TaskSpec


class JobState(StrEnum):
    queued = "queued"  # recorded, waiting for a worker
    running = "running"  # a worker is computing it
    succeeded = "succeeded"  # finished; the result and provenance are stored
    failed = "failed"  # ended with an error; see `error`
    cancelled = "cancelled"  # stopped on request

    @property
    def finished(self) -> bool:
        return self in (JobState.succeeded, JobState.failed, JobState.cancelled)


class JobCreate(BaseModel):
    """What a user submits."""

    model_config = ConfigDict(extra="forbid")
    structure: Structure
    task: TaskSpec
    calculator: str = Field(
        description="A registered calculator: 'name' pins the newest version, "
        "'name@version' an exact one."
    )
    tags: list[str] = Field(default_factory=list, max_length=32)


class Progress(BaseModel):
    step: int
    total_steps: int
    energy: float | None = None
    fmax: float | None = None
    updated_at: datetime


class JobPublic(BaseModel):
    """A job as the service reports it."""

    id: int
    owner: str
    state: JobState
    kind: str
    calculator: str = Field(description="The exact version the job is pinned to, name@version.")
    task: TaskSpec
    tags: list[str]
    natoms: int
    formula: str
    input_hash: str
    attempts: int
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    progress: Progress | None
    cancel_requested: bool
    error: str | None


class JobPage(BaseModel):
    items: list[JobPublic]
    total: int
    offset: int
    limit: int


class CalculatorPublic(BaseModel):
    name: str
    version: str
    ref: str = Field(description="name@version")
    backend: str
    parameters: dict[str, JsonValue]
    elements: list[str]
    weights_sha256: str | None
    notes: str
    retired: bool
    created_at: datetime
