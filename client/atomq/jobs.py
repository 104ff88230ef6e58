"""Jobs, calculators and users as they appear on the wire."""

from __future__ import annotations

from datetime import datetime
from enum import StrEnum
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, JsonValue, model_validator

from atomq.structure import Structure
from atomq.tasks import NEB, TaskSpec


class JobState(StrEnum):
    queued = "queued"  # recorded, waiting for a worker
    running = "running"  # a worker is computing it
    succeeded = "succeeded"  # finished; the result and provenance are stored
    failed = "failed"  # ended with an error; see `error`
    cancelled = "cancelled"  # stopped on request

    @property
    def finished(self) -> bool:
        return self in (JobState.succeeded, JobState.failed, JobState.cancelled)


CalculatorRef = Annotated[
    str,
    Field(
        pattern=r"^[A-Za-z0-9_.-]{1,64}(@[A-Za-z0-9_.-]{1,64})?$",
        description="A registered calculator: 'name' pins the newest version, "
        "'name@version' an exact one.",
    ),
]
Tags = Annotated[
    list[Annotated[str, Field(pattern=r"^[A-Za-z0-9_.@+-]{1,64}$")]],
    Field(max_length=32, description="Labels of letters, digits and _ . @ + - (1-64 characters)."),
]


class JobCreate(BaseModel):
    """What a user submits. `structure` is required except for NEB, whose endpoints are
    part of the task."""

    model_config = ConfigDict(extra="forbid")
    structure: Structure | None = None
    task: TaskSpec
    calculator: CalculatorRef
    tags: Tags = Field(default_factory=list)
    time_limit_s: float | None = Field(
        default=None, gt=0, description="Wall-time limit; at most the service's own limit."
    )
    reuse: bool = Field(
        default=True,
        description="Set false to compute again even if an identical finished job exists. "
        "When true, a job whose input hash (structure, task, calculator version, seed) "
        "matches a job that succeeded is answered at once with a copy of that result. MD "
        "jobs without a seed get a random one from the service, so they are never reused.",
    )

    @model_validator(mode="after")
    def _structure_matches_task(self) -> JobCreate:
        if isinstance(self.task, NEB):
            if self.structure is not None:
                raise ValueError(
                    "an NEB job takes its structures from task.initial and task.final; "
                    "leave `structure` out"
                )
        elif self.structure is None:
            raise ValueError(f"this {self.task.kind} job needs a structure")
        return self


class Progress(BaseModel):
    step: int
    total_steps: int
    energy: float | None = Field(default=None, description="eV")
    fmax: float | None = Field(default=None, description="eV/Angstrom")
    temperature_K: float | None = None
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
    hash_version: int = Field(
        default=1, description="The canonical form input_hash covers (atomq.hashing)."
    )
    attempts: int
    parents: list[int] = Field(default_factory=list, description="Jobs whose results it used.")
    time_limit_s: float
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    progress: Progress | None
    cancel_requested: bool
    converged: bool | None = Field(
        default=None, description="Relax and NEB: False means max_steps came first."
    )
    reused_from: int | None = Field(
        default=None,
        description="The earlier job with the same input hash whose result this job took "
        "instead of computing it again; its provenance names that job.",
    )
    error: str | None
    waiting_reason: str | None = Field(
        default=None,
        description="For a queued job that no live worker can run: why (no worker running, "
        "or each worker's reason). None while a worker that can run it is busy.",
    )


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
    weights_path: str | None = Field(
        default=None,
        description="A registered weights file on the workers; none for no weights or for a "
        "checkpoint shipped inside the backend's package (found in each installation).",
    )
    weights_sha256: str | None = Field(
        default=None, description="Every worker checks the file against this before loading."
    )
    weights_size: int | None = None
    notes: str
    retired: bool
    is_default: bool = Field(
        default=False, description="What the bare name means now (an admin's decision)."
    )
    jobs_run: int = Field(default=0, description="Jobs this version has run (attempted).")
    workers: list[str] = Field(
        default_factory=list, description="Live workers that can run this version now."
    )
    unavailable: dict[str, str] = Field(
        default_factory=dict,
        description="Live workers that cannot run it, each with the reason.",
    )
    created_at: datetime


class WorkerPublic(BaseModel):
    """A live worker: the calculator versions it serves and why it cannot serve others."""

    name: str
    host: str
    pid: int
    concurrency: int
    calculators: list[str]
    unavailable: dict[str, str]
    started_at: datetime
    last_seen: datetime
