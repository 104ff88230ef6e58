"""Batches on the wire: many structures, one task and one calculator, in one request.

A batch is a set of ordinary jobs created together (each with its own id, state, result
and provenance) plus a record that keeps them in submission order, so that thousands
of structures cost one request to submit, one to follow and a few to fetch.
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from atomq.jobs import CalculatorRef, Tags
from atomq.results import Result
from atomq.structure import Structure
from atomq.tasks import MD, Relax, SinglePoint

# Every task kind that runs on one structure (NEB takes its two endpoints in its task).
BatchTask = Annotated[SinglePoint | Relax | MD, Field(discriminator="kind")]

MAX_BATCH_STRUCTURES = 20_000


class BatchCreate(BaseModel):
    """Structures to run, all with the same task and calculator version."""

    model_config = ConfigDict(extra="forbid")
    structures: list[Structure] = Field(
        min_length=1,
        max_length=MAX_BATCH_STRUCTURES,
        description=f"1 to {MAX_BATCH_STRUCTURES} structures; results keep this order.",
    )
    task: BatchTask
    calculator: CalculatorRef
    tags: Tags = Field(default_factory=list)
    time_limit_s: float | None = Field(
        default=None, gt=0, description="Wall-time limit of each job."
    )
    reuse: bool = Field(
        default=True,
        description="As for a single job: a structure whose input hash matches a job that "
        "succeeded is answered with a copy of that result. MD without a seed draws one per "
        "structure, so it is never reused.",
    )


class BatchPublic(BaseModel):
    """A batch and how far its jobs have got."""

    id: int
    owner: str
    calculator: str = Field(description="name@version, fixed at submission")
    kind: str
    size: int
    created_at: datetime
    counts: dict[str, int] = Field(description="Jobs per state (only states that occur).")
    finished: bool = Field(description="Every job has succeeded, failed or been cancelled.")
    job_ids: list[int] = Field(description="The batch's jobs in submission order.")


class BatchItem(BaseModel):
    job_id: int
    index: int = Field(description="Position in the submitted list of structures.")
    state: str
    error: str | None = None
    result: Result | None = Field(default=None, description="Only for succeeded jobs.")


class BatchResults(BaseModel):
    """One page of a batch's results, in submission order."""

    batch_id: int
    offset: int
    limit: int
    total: int
    items: list[BatchItem]
