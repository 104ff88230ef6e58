"""Tables. Every filter the API offers has an index here."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Column,
    DateTime,
    Index,
    TypeDecorator,
    UniqueConstraint,
)
from sqlmodel import Field, SQLModel


def utcnow() -> datetime:
    return datetime.now(UTC)


class UTCDateTime(TypeDecorator[datetime]):
    """Timestamps are stored in UTC and always come back timezone-aware (SQLite drops zones)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is not None and value.tzinfo is None:
            raise ValueError("naive datetime; use atomq_service.models.utcnow()")
        return value

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is not None and value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value


class User(SQLModel, table=True):
    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(unique=True, index=True)
    role: str = Field(default="member")  # "member" or "admin"
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)


class ApiToken(SQLModel, table=True):
    """A bearer token, stored as its sha256 only; the plaintext is shown once."""

    id: int | None = Field(default=None, primary_key=True)
    user_id: int = Field(foreign_key="user.id", index=True)
    token_sha256: str = Field(unique=True, index=True)
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)
    expires_at: datetime | None = Field(default=None, sa_type=UTCDateTime)
    revoked: bool = False


class Calculator(SQLModel, table=True):
    """An immutable registered calculator version, `name@version`."""

    __table_args__ = (UniqueConstraint("name", "version"),)

    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(index=True)
    version: str
    backend: str  # entry point name in group atomq.calculators
    parameters: dict[str, Any] = Field(default_factory=dict, sa_column=Column(JSON))
    elements: list[str] = Field(default_factory=list, sa_column=Column(JSON))
    # A user's weights file: its path on the workers (a shared folder). A checkpoint that
    # ships inside a package has no path: each worker finds it in its own installation.
    # Either way the sha256 is the identity every worker checks before loading.
    weights_path: str | None = None
    weights_sha256: str | None = Field(default=None, index=True)
    weights_size: int | None = None
    notes: str = ""
    retired: bool = False
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)

    @property
    def ref(self) -> str:
        return f"{self.name}@{self.version}"


class Deployment(SQLModel, table=True):
    """This installation's identity, made once with its database: every PROV identifier
    carries it, so records from two labs (or two databases of one) never collide."""

    id: int = Field(default=1, primary_key=True)  # one row
    identity: str  # a random UUID
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)


class DefaultVersion(SQLModel, table=True):
    """Which version a bare calculator name means: one row per decision, never edited; the
    newest row of a name is in force. Registering a version never adds one, except for the
    first version of a name."""

    # The decision in force for a name: the last row of that name, an index range.
    __table_args__ = (Index("ix_defaultversion_name_id", "name", "id"),)

    id: int | None = Field(default=None, primary_key=True)
    name: str
    calculator_id: int = Field(foreign_key="calculator.id")
    # The admin who decided; none where atomq set it (a name's first version, an upgrade).
    set_by_id: int | None = Field(default=None, foreign_key="user.id")
    reason: str = ""
    set_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)


class Batch(SQLModel, table=True):
    """Structures submitted together with one task and calculator; each is a Job."""

    # A client's retry of the same request (same owner, same key) finds this row.
    __table_args__ = (UniqueConstraint("owner_id", "idempotency_key"),)

    id: int | None = Field(default=None, primary_key=True)
    owner_id: int = Field(foreign_key="user.id", index=True)
    calculator_id: int = Field(foreign_key="calculator.id")
    calculator_ref: str
    kind: str
    size: int
    idempotency_key: str | None = None
    request_sha256: str | None = None
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime, index=True)


class Job(SQLModel, table=True):
    __table_args__ = (
        # A client's retry of the same submission (same owner, same key) finds this row.
        UniqueConstraint("owner_id", "idempotency_key"),
        # A batch's unfinished jobs, counted while a client waits for the batch.
        Index("ix_job_batch_state", "batch_id", "state"),
        # An owner's queued and running jobs, counted at every submission (the queue
        # limit): on owner_id alone the count read every job the owner ever ran.
        Index("ix_job_owner_state", "owner_id", "state"),
    )

    id: int | None = Field(default=None, primary_key=True)
    owner_id: int = Field(foreign_key="user.id")  # indexed with state, above
    state: str = Field(default="queued", index=True)
    kind: str = Field(index=True)
    calculator_id: int = Field(foreign_key="calculator.id", index=True)
    calculator_ref: str = Field(index=True)  # name@version, fixed at submission
    task: dict[str, Any] = Field(sa_column=Column(JSON, nullable=False))
    structure: dict[str, Any] = Field(sa_column=Column(JSON, nullable=False))
    natoms: int
    formula: str
    input_hash: str = Field(index=True)
    # The canonical form the hash was computed over (atomq.hashing): jobs recorded before
    # hash versions existed read 1 and keep their hash; new jobs are written at 2.
    hash_version: int = Field(default=2, sa_column_kwargs={"server_default": "1"})
    seed: int | None = Field(default=None, sa_type=BigInteger)
    parents: list[int] = Field(default_factory=list, sa_column=Column(JSON, nullable=False))
    time_limit_s: float
    attempts: int = 0
    # The running attempt holds a lease its worker renews; an expired lease means the
    # worker died and another delivery may take the job over.
    lease_expires_at: datetime | None = Field(default=None, sa_type=UTCDateTime)
    cancel_requested: bool = False
    idempotency_key: str | None = None
    request_sha256: str | None = None  # what the key was first used for
    # Set once the broker accepted the job's message; the reconciler re-sends the rest.
    dispatched_at: datetime | None = Field(default=None, sa_type=UTCDateTime, index=True)
    # Set when the result was taken from an earlier job with the same input hash.
    reused_from: int | None = Field(default=None, foreign_key="job.id", index=True)
    # Jobs submitted together: the batch and the structure's place in its list.
    batch_id: int | None = Field(default=None, foreign_key="batch.id")  # indexed above
    batch_index: int | None = None
    converged: bool | None = None  # relax and NEB: False is shown prominently everywhere
    progress: dict[str, Any] | None = Field(default=None, sa_column=Column(JSON))
    error: str | None = None
    worker: str | None = None  # host:pid of the process that ran it last
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime, index=True)
    started_at: datetime | None = Field(default=None, sa_type=UTCDateTime)
    finished_at: datetime | None = Field(default=None, sa_type=UTCDateTime)


class JobPackage(SQLModel, table=True):
    """The version of each package a result was computed with, from its provenance, kept
    as rows so "every job run with sevenn 0.13.0" is an indexed query."""

    job_id: int = Field(foreign_key="job.id", primary_key=True)
    package: str = Field(primary_key=True, index=True)
    version: str = Field(index=True)


class Worker(SQLModel, table=True):
    """A running `atomq worker` and the calculator versions it can run, renewed by its
    heartbeat; a record not seen for a few heartbeats belongs to a worker that is gone."""

    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(unique=True, index=True)  # celery's hostname, atomq-PID@HOST
    host: str
    pid: int
    concurrency: int
    heartbeat_s: float  # its renewal interval: unseen for three of them means gone
    calculators: list[str] = Field(default_factory=list, sa_column=Column(JSON, nullable=False))
    # ref -> why this worker cannot run it (backend missing, weights differ, ...).
    unavailable: dict[str, str] = Field(
        default_factory=dict, sa_column=Column(JSON, nullable=False)
    )
    started_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)
    last_seen: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime, index=True)
    stopped_at: datetime | None = Field(default=None, sa_type=UTCDateTime)


class JobAttempt(SQLModel, table=True):
    """One attempt's lease history: enough to prove no two attempts ever overlapped."""

    __table_args__ = (UniqueConstraint("job_id", "attempt"),)

    id: int | None = Field(default=None, primary_key=True)
    job_id: int = Field(foreign_key="job.id", index=True)
    attempt: int
    worker: str
    started_at: datetime = Field(sa_type=UTCDateTime)
    lease_expires_at: datetime = Field(sa_type=UTCDateTime)  # the last lease it held
    ended_at: datetime | None = Field(default=None, sa_type=UTCDateTime)
    outcome: str | None = None  # the state it ended the job in, or "superseded"


class JobTag(SQLModel, table=True):
    job_id: int = Field(foreign_key="job.id", primary_key=True)
    tag: str = Field(primary_key=True, index=True)


class Artifact(SQLModel, table=True):
    """A file written by one attempt of a job; only the winning attempt's are recorded."""

    id: int | None = Field(default=None, primary_key=True)
    job_id: int = Field(foreign_key="job.id", index=True)
    attempt: int
    name: str
    media_type: str
    path: str  # relative to the artifact store; never chosen by a client
    size: int
    sha256: str
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)


class JobResult(SQLModel, table=True):
    """The result and its provenance, written together in one transaction, once."""

    job_id: int = Field(foreign_key="job.id", primary_key=True)
    result: dict[str, Any] = Field(sa_column=Column(JSON, nullable=False))
    provenance: dict[str, Any] = Field(sa_column=Column(JSON, nullable=False))
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime)


class Comparison(SQLModel, table=True):
    """A model-swap report: finished jobs rerun under another calculator version."""

    # A client's retry of the same request (same owner, same key) finds this row.
    __table_args__ = (UniqueConstraint("owner_id", "idempotency_key"),)

    id: int | None = Field(default=None, primary_key=True)
    owner_id: int = Field(foreign_key="user.id", index=True)
    calculator_id: int = Field(foreign_key="calculator.id", index=True)
    calculator_ref: str = Field(index=True)  # the candidate, name@version
    selection: str  # how the baseline jobs were chosen, in words
    idempotency_key: str | None = None
    request_sha256: str | None = None
    created_at: datetime = Field(default_factory=utcnow, sa_type=UTCDateTime, index=True)


class ComparisonItem(SQLModel, table=True):
    """One baseline job of a comparison and the job that reran it."""

    comparison_id: int = Field(foreign_key="comparison.id", primary_key=True)
    baseline_job_id: int = Field(foreign_key="job.id", primary_key=True, index=True)
    candidate_job_id: int = Field(foreign_key="job.id", unique=True, index=True)
