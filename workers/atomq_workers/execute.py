"""One job, start to finish, in a worker process.

The database decides who runs a job, not the broker. A delivery claims the job with a
conditional update (queued, or running with an expired lease -> running, attempt + 1)
and then holds a lease that a heartbeat thread renews. A delivery for a job whose lease
is alive elsewhere is dropped; the service's reconciler re-sends a job whose lease
expired. Progress, artifacts, the result and the final state are written only while
this attempt is still the job's current one, so a superseded attempt never overwrites
the winner, and a result is written once.
"""

from __future__ import annotations

import logging
import math
import os
import socket
import threading
import time
from dataclasses import dataclass
from datetime import timedelta
from typing import Any, TypeVar

from pydantic import TypeAdapter
from sqlalchemy import Connection, Engine, bindparam, insert, update
from sqlmodel import col, select

from atomq.jobs import JobState
from atomq.results import ArtifactRecord, Provenance, ResultModel
from atomq.structure import Structure
from atomq.tasks import NEB, TaskSpec
from atomq_service.db import transaction
from atomq_service.jobs import package_rows
from atomq_service.models import (
    Artifact,
    Calculator,
    Job,
    JobAttempt,
    JobPackage,
    JobResult,
    User,
    utcnow,
)
from atomq_service.settings import Settings
from atomq_workers.artifacts import ArtifactWriter, WrittenArtifact
from atomq_workers.calculators import get_calculator
from atomq_workers.provenance import environment
from atomq_workers.runners import run_task

log = logging.getLogger(__name__)

_task_adapter: TypeAdapter[TaskSpec] = TypeAdapter(TaskSpec)
T = TypeVar("T", Calculator, User)


class Stop(Exception):
    """Raised from inside a running task to end it at the current step."""

    def __init__(self, step: int, state: JobState, reason: str) -> None:
        super().__init__(reason)
        self.step = step
        self.state = state
        self.reason = reason


class Superseded(Exception):
    """This attempt lost its lease; another attempt owns the job now."""


@dataclass(frozen=True)
class Outcome:
    state: str
    lease_left_s: float | None = None  # set when the job is running elsewhere


def worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


# -- claiming -----------------------------------------------------------------
@dataclass(frozen=True)
class Claimed:
    """What a claim hands the run: its attempt number and the records it needs."""

    attempt: int
    job: Job
    record: Calculator
    owner: User


# Calculator versions and users are immutable records (retiring a version does not
# concern a job already submitted): each worker process reads each one once.
_calculators: dict[int, Calculator] = {}
_owners: dict[int, User] = {}


def _cached(connection: Connection, model: type[T], key: int, cache: dict[int, T]) -> T:
    if key not in cache:
        row = connection.execute(select(model).where(model.id == key)).one()
        cache[key] = model(**row._mapping)
    return cache[key]


def claim(engine: Engine, job_id: int, settings: Settings) -> tuple[Claimed | None, Outcome | None]:
    """Take the job for a new attempt; returns (the claim, None) or (None, why not).

    One transaction in SQLAlchemy Core: a claim is on every job's path, and the ORM's
    bookkeeping cost milliseconds per job where the database work takes microseconds."""
    now = utcnow()
    with engine.begin() as connection:
        row = connection.execute(select(Job).where(col(Job.id) == job_id)).first()
        if row is None:
            return None, Outcome("unknown")
        job = Job(**row._mapping)
        state = JobState(job.state)
        expired = job.lease_expires_at is None or job.lease_expires_at <= now
        if state is JobState.running and not expired:
            assert job.lease_expires_at is not None
            return None, Outcome("busy", (job.lease_expires_at - now).total_seconds())
        if state not in (JobState.queued, JobState.running):
            return None, Outcome("finished")
        seen_state, seen_attempts = job.state, job.attempts
        values: dict[str, Any]
        if state is JobState.running and job.cancel_requested:
            values = {
                "state": JobState.cancelled.value,
                "finished_at": now,
                "error": "cancelled; its worker had stopped",
            }
        elif job.attempts >= settings.max_attempts:
            values = {
                "state": JobState.failed.value,
                "finished_at": now,
                "error": f"worker_lost: the job's worker died {job.attempts} times "
                "(ATOMQ_MAX_ATTEMPTS); the job may crash its worker",
            }
        else:
            values = {
                "state": JobState.running.value,
                "attempts": seen_attempts + 1,
                "started_at": now,
                "lease_expires_at": now + timedelta(seconds=settings.lease_s),
                "worker": worker_name(),
            }
        # Optimistic: only if nobody else changed the row since we read it.
        changed = connection.execute(
            update(Job)
            .where(
                col(Job.id) == job_id,
                col(Job.state) == seen_state,
                col(Job.attempts) == seen_attempts,
            )
            .values(**values)
        )
        if not changed.rowcount:
            return None, Outcome("taken")
        if seen_attempts:  # the previous attempt's worker stopped renewing: it was lost
            connection.execute(
                update(JobAttempt)
                .where(
                    col(JobAttempt.job_id) == job_id,
                    col(JobAttempt.attempt) == seen_attempts,
                    col(JobAttempt.outcome).is_(None),
                )
                .values(outcome="lost")
            )
        if values["state"] != JobState.running.value:
            return None, Outcome(values["state"])
        connection.execute(
            insert(JobAttempt).values(
                job_id=job_id,
                attempt=seen_attempts + 1,
                worker=values["worker"],
                started_at=now,
                lease_expires_at=values["lease_expires_at"],
            )
        )
        for name, value in values.items():
            setattr(job, name, value)
        record = _cached(connection, Calculator, job.calculator_id, _calculators)
        owner = _cached(connection, User, job.owner_id, _owners)
        return Claimed(seen_attempts + 1, job, record, owner), None


def _mine(job_id: int, attempt: int) -> tuple[Any, ...]:
    """The WHERE clause that matches the job only while this attempt owns it."""
    return (
        col(Job.id) == job_id,
        col(Job.attempts) == attempt,
        col(Job.state) == JobState.running.value,
    )


class Lease(threading.Thread):
    """Renews the attempt's lease and reads cancel requests, independent of step length."""

    def __init__(self, engine: Engine, job_id: int, attempt: int, settings: Settings) -> None:
        super().__init__(name=f"lease-{job_id}", daemon=True)
        self.engine = engine
        self.job_id = job_id
        self.attempt = attempt
        self.lease_s = settings.lease_s
        self.interval_s = min(settings.lease_s / 4, settings.progress_interval_s)
        self.lost = False
        self.cancel_requested = False
        self._stop_event = threading.Event()

    def run(self) -> None:
        while not self._stop_event.wait(self.interval_s):
            try:
                self.renew()
            except Exception:  # a database hiccup; the lease has slack (4 renewals)
                log.exception("could not renew the lease of job %s", self.job_id)

    def renew(self) -> None:
        expires = utcnow() + timedelta(seconds=self.lease_s)
        with transaction(self.engine) as session:
            renewed = session.execute(
                update(Job)
                .where(*_mine(self.job_id, self.attempt))
                .values(lease_expires_at=expires)
            )
            if not renewed.rowcount:  # type: ignore[attr-defined]
                self.lost = True
                return
            session.execute(
                update(JobAttempt)
                .where(
                    col(JobAttempt.job_id) == self.job_id, col(JobAttempt.attempt) == self.attempt
                )
                .values(lease_expires_at=expires)
            )
            job = session.get(Job, self.job_id)
            self.cancel_requested = bool(job and job.cancel_requested)

    def stop(self) -> None:
        self._stop_event.set()


class GroupLease(threading.Thread):
    """One lease for jobs claimed together: renews them all in one statement and reads
    which of them were asked to cancel."""

    def __init__(self, engine: Engine, attempts: dict[int, int], settings: Settings) -> None:
        super().__init__(name="lease-group", daemon=True)
        self.engine = engine
        self.attempts = attempts  # job id -> attempt
        self.lease_s = settings.lease_s
        self.interval_s = min(settings.lease_s / 4, settings.progress_interval_s)
        self.lost: set[int] = set()
        self.cancel_requested: set[int] = set()
        self._stop_event = threading.Event()

    def view(self, job_id: int) -> LeaseView:
        return LeaseView(self, job_id)

    def run(self) -> None:
        while not self._stop_event.wait(self.interval_s):
            try:
                self.renew()
            except Exception:  # a database hiccup; the lease has slack (4 renewals)
                log.exception("could not renew the lease of jobs %s", sorted(self.attempts))

    def renew(self) -> None:
        expires = utcnow() + timedelta(seconds=self.lease_s)
        worker = worker_name()
        with self.engine.begin() as connection:
            # Ours while running under this worker at the attempt we claimed.
            rows = connection.execute(select(Job).where(col(Job.id).in_(list(self.attempts)))).all()
            mine = []
            for row in rows:
                job_id = row.id
                if row.state != JobState.running.value:
                    continue  # finished (recorded by us) or taken back
                if row.attempts != self.attempts[job_id] or row.worker != worker:
                    self.lost.add(job_id)
                    continue
                mine.append(job_id)
                if row.cancel_requested:
                    self.cancel_requested.add(job_id)
            if mine:
                connection.execute(
                    update(Job).where(col(Job.id).in_(mine)).values(lease_expires_at=expires)
                )
                connection.execute(
                    update(JobAttempt)
                    .where(
                        col(JobAttempt.job_id) == bindparam("renewed_job"),
                        col(JobAttempt.attempt) == bindparam("renewed_attempt"),
                    )
                    .values(lease_expires_at=expires),
                    [{"renewed_job": j, "renewed_attempt": self.attempts[j]} for j in mine],
                )

    def stop(self) -> None:
        self._stop_event.set()


@dataclass
class LeaseView:
    """One job's share of a GroupLease, with a Lease's two flags."""

    group: GroupLease
    job_id: int

    @property
    def lost(self) -> bool:
        return self.job_id in self.group.lost

    @property
    def cancel_requested(self) -> bool:
        return self.job_id in self.group.cancel_requested


class ProgressWriter:
    """Called by the runner after every step: stops the run when asked to (cancel, time
    limit, lost lease), and writes progress at most every `interval_s`."""

    def __init__(
        self,
        engine: Engine,
        job_id: int,
        attempt: int,
        lease: Lease | LeaseView,
        interval_s: float,
        time_limit_s: float,
    ) -> None:
        self.engine = engine
        self.job_id = job_id
        self.attempt = attempt
        self.lease = lease
        self.interval_s = interval_s
        self.time_limit_s = time_limit_s
        self.started = time.monotonic()
        # The claim already shows the job running; the first progress row waits one
        # interval, so a job shorter than that writes none (a database write saved).
        self.last_write = self.started
        self.step = 0
        self.latest: dict[str, object] | None = None

    def __call__(
        self,
        step: int,
        total_steps: int,
        *,
        energy: float | None = None,
        fmax: float | None = None,
        temperature_K: float | None = None,
    ) -> None:
        self.step = step
        self.latest = {
            "step": step,
            "total_steps": total_steps,
            "energy": energy,
            "fmax": fmax,
            "temperature_K": temperature_K,
        }
        if self.lease.lost:
            raise Superseded()
        for name, value in (("energy", energy), ("fmax", fmax), ("temperature", temperature_K)):
            if value is not None and not math.isfinite(value):
                raise Stop(
                    step,
                    JobState.failed,
                    f"non_finite: the {name} became {value} at step {step}; check the "
                    "structure, the time step and the calculator's range",
                )
        if self.lease.cancel_requested:
            raise Stop(step, JobState.cancelled, f"cancelled at step {step}")
        elapsed = time.monotonic() - self.started
        if elapsed > self.time_limit_s:
            raise Stop(
                step,
                JobState.failed,
                f"time_limit: stopped at step {step} after {elapsed:.1f} s "
                f"(limit {self.time_limit_s:g} s); partial artifacts are kept",
            )
        now = time.monotonic()
        if now - self.last_write < self.interval_s:
            return
        self.last_write = now
        with transaction(self.engine) as session:
            session.execute(
                update(Job)
                .where(*_mine(self.job_id, self.attempt))
                .values(progress=self.snapshot())
            )

    def snapshot(self) -> dict[str, object] | None:
        """The latest report, stamped now; stored with the final state so it is never stale."""
        if self.latest is None:
            return None
        return {**self.latest, "updated_at": utcnow().isoformat()}


def _attempt_row(job_id: int, attempt: int) -> tuple[Any, ...]:
    return (col(JobAttempt.job_id) == job_id, col(JobAttempt.attempt) == attempt)


def _end_attempt(engine: Engine, job_id: int, attempt: int, outcome: str) -> None:
    with transaction(engine) as session:
        session.execute(
            update(JobAttempt)
            .where(*_attempt_row(job_id, attempt))
            .values(ended_at=utcnow(), outcome=outcome)
        )


# -- running --------------------------------------------------------------------
@dataclass
class Computed:
    """An attempt's outcome, ready to be recorded."""

    job_id: int
    attempt: int
    state: JobState
    reason: str | None
    result: ResultModel | None
    provenance: Provenance | None
    written: list[WrittenArtifact]
    report: ProgressWriter


def run_job(engine: Engine, job_id: int, settings: Settings) -> Outcome:
    """Run one delivery of a job. Never raises for a job's own error."""
    claimed, refused = claim(engine, job_id, settings)
    if claimed is None:
        assert refused is not None
        log.info("job %s: not run by this delivery (%s)", job_id, refused.state)
        return refused
    lease = Lease(engine, job_id, claimed.attempt, settings)
    lease.start()
    try:
        computed = compute(engine, claimed, settings, lease, settings.progress_interval_s)
    finally:
        lease.stop()
    if computed is None:
        return Outcome("superseded")
    return finish(engine, computed)


def run_single_points(engine: Engine, job_ids: list[int], settings: Settings) -> list[Outcome]:
    """Run a batch message's jobs. Queued single points are claimed together in one
    transaction, share one lease, and have their results recorded together (every
    GROUP_FLUSH_S or GROUP_FLUSH_JOBS jobs): for small structures the per-job database
    work of a claim and a result would cost about as much as the calculation. Every
    other job goes through run_job on its own."""
    claimed = claim_group(engine, job_ids, settings)
    outcomes: dict[int, Outcome] = {}
    if claimed:
        lease = GroupLease(engine, {c.job.id: c.attempt for c in claimed}, settings)  # type: ignore[misc]
        lease.start()
        pending: list[Computed] = []
        flushed = time.monotonic()
        try:
            for one in claimed:
                assert one.job.id is not None
                # No progress rows: a single point has no steps worth reporting.
                computed = compute(engine, one, settings, lease.view(one.job.id), math.inf)
                if computed is None:
                    outcomes[one.job.id] = Outcome("superseded")
                    continue
                pending.append(computed)
                if len(pending) >= GROUP_FLUSH_JOBS or time.monotonic() - flushed > GROUP_FLUSH_S:
                    outcomes.update(finish_group(engine, pending))
                    pending, flushed = [], time.monotonic()
        finally:
            outcomes.update(finish_group(engine, pending))
            lease.stop()
    for job_id in job_ids:
        if job_id not in outcomes:
            outcomes[job_id] = run_job(engine, job_id, settings)
    return [outcomes[job_id] for job_id in job_ids]


# A group's results are written at least this often (seconds) and this many at a time,
# so clients see them without waiting for the whole message.
GROUP_FLUSH_S = 0.5
GROUP_FLUSH_JOBS = 64


def claim_group(engine: Engine, job_ids: list[int], settings: Settings) -> list[Claimed]:
    """Claim every queued single point among `job_ids` in one transaction (attempt + 1,
    one lease). Jobs in any other state are left for run_job's own claim."""
    now = utcnow()
    worker = worker_name()
    lease_until = now + timedelta(seconds=settings.lease_s)
    with engine.begin() as connection:
        taken = connection.execute(
            update(Job)
            .where(
                col(Job.id).in_(job_ids),
                col(Job.state) == JobState.queued.value,
                col(Job.kind) == "single_point",
                col(Job.attempts) < settings.max_attempts,
            )
            .values(
                state=JobState.running.value,
                attempts=col(Job.attempts) + 1,
                started_at=now,
                lease_expires_at=lease_until,
                worker=worker,
            )
            .returning(col(Job.id))
        ).all()
        ids = {row[0] for row in taken}
        if not ids:
            return []
        jobs = [
            Job(**row._mapping)
            for row in connection.execute(select(Job).where(col(Job.id).in_(ids))).all()
        ]
        connection.execute(
            insert(JobAttempt),
            [
                {
                    "job_id": job.id,
                    "attempt": job.attempts,
                    "worker": worker,
                    "started_at": now,
                    "lease_expires_at": lease_until,
                }
                for job in jobs
            ],
        )
        by_id = {
            job.id: Claimed(
                job.attempts,
                job,
                _cached(connection, Calculator, job.calculator_id, _calculators),
                _cached(connection, User, job.owner_id, _owners),
            )
            for job in jobs
        }
    return [by_id[job_id] for job_id in job_ids if job_id in by_id]  # the message's order


def finish_group(engine: Engine, computed: list[Computed]) -> dict[int, Outcome]:
    """Record several attempts' ends in one transaction; each only if it still owns its
    job (a superseded one writes nothing and its attempt is marked so)."""
    if not computed:
        return {}
    outcomes: dict[int, Outcome] = {}
    with engine.begin() as connection:
        plain = [one for one in computed if not one.written]
        recorded = _record_many(connection, plain)
        for one in plain:
            outcomes[one.job_id] = Outcome(
                one.state.value if one.job_id in recorded else "superseded"
            )
        for one in computed:
            if one.written:  # files to record with ids: one at a time
                recorded_one = _record(connection, one)
                outcomes[one.job_id] = Outcome(one.state.value if recorded_one else "superseded")
    for one in computed:
        if outcomes[one.job_id].state == "superseded":
            _end_attempt(engine, one.job_id, one.attempt, "superseded")
    return outcomes


# The statements of _record_many, built once: compiling them anew for every group cost
# more than running them.
_END_JOB = (
    update(Job)
    .where(
        col(Job.id) == bindparam("end_job"),
        col(Job.attempts) == bindparam("end_attempt"),
        col(Job.state) == JobState.running.value,
    )
    .values(
        state=bindparam("end_state"),
        finished_at=bindparam("end_at"),
        error=bindparam("end_error"),
        progress=bindparam("end_progress"),
        lease_expires_at=None,
        converged=bindparam("end_converged"),
    )
)
_END_ATTEMPT = (
    update(JobAttempt)
    .where(
        col(JobAttempt.job_id) == bindparam("end_job"),
        col(JobAttempt.attempt) == bindparam("end_attempt"),
    )
    .values(ended_at=bindparam("end_at"), outcome=bindparam("end_state"))
)


def _record_many(connection: Connection, computed: list[Computed]) -> set[int]:
    """_record for attempts without files, a few statements for all of them; returns the
    job ids recorded (the others were superseded and nothing of theirs is written)."""
    if not computed:
        return set()
    expected = {one.job_id: one.attempt for one in computed}
    # Locked (PostgreSQL; SQLite holds the whole database), so ownership cannot change
    # between this check and the writes below.
    current = connection.execute(
        select(col(Job.id), col(Job.attempts), col(Job.state))
        .where(col(Job.id).in_(list(expected)))
        .with_for_update()
    ).all()
    owned = {
        job_id
        for job_id, attempts, state in current
        if job_id is not None and state == JobState.running.value and attempts == expected[job_id]
    }
    mine = [one for one in computed if one.job_id in owned]
    if not mine:
        return set()
    ends = [
        {
            "end_job": one.job_id,
            "end_attempt": one.attempt,
            "end_state": one.state.value,
            "end_at": one.provenance.finished_at if one.provenance else utcnow(),
            "end_error": one.reason,
            "end_progress": one.report.snapshot(),
            "end_converged": getattr(one.result, "converged", None),
        }
        for one in mine
    ]
    connection.execute(_END_JOB, ends)
    connection.execute(_END_ATTEMPT, ends)
    stored = set(
        connection.execute(
            select(col(JobResult.job_id)).where(col(JobResult.job_id).in_(list(owned)))
        ).scalars()
    )
    results, packages = [], []
    for one, end in zip(mine, ends, strict=True):
        if one.result is None or one.provenance is None or one.job_id in stored:
            continue
        results.append(
            {
                "job_id": one.job_id,
                "result": one.result.model_dump(mode="json"),
                "provenance": one.provenance.model_dump(mode="json"),
                "created_at": end["end_at"],
            }
        )
        packages += package_rows(one.job_id, one.provenance.packages)
    if results:
        connection.execute(insert(JobResult), results)
    if packages:
        connection.execute(insert(JobPackage), packages)
    return owned


def compute(
    engine: Engine,
    claimed: Claimed,
    settings: Settings,
    lease: Lease | LeaseView,
    progress_interval_s: float,
) -> Computed | None:
    """Run the claimed attempt's task; None if it lost the job to another attempt."""
    attempt, job, record, owner = claimed.attempt, claimed.job, claimed.record, claimed.owner
    assert job.id is not None
    job_id = job.id
    started_at = job.started_at or utcnow()
    artifacts = ArtifactWriter(settings.artifacts_dir, job_id, attempt)
    report = ProgressWriter(engine, job_id, attempt, lease, progress_interval_s, job.time_limit_s)
    result: ResultModel | None = None
    state, reason = JobState.succeeded, None
    loaded = None
    compute_s = 0.0
    try:
        if lease.cancel_requested:  # asked while the job waited in its group
            raise Stop(0, JobState.cancelled, "cancelled before it started")
        loaded = get_calculator(record, settings.model_cache_mb)
        task = _task_adapter.validate_python(job.task)
        atoms = (
            None if isinstance(task, NEB) else Structure.model_validate(job.structure).to_atoms()
        )
        computing = time.perf_counter()
        result = run_task(atoms, loaded, task, report, artifacts)
        compute_s = time.perf_counter() - computing
    except Superseded:
        log.warning("job %s attempt %s lost its lease; discarding its work", job_id, attempt)
        artifacts.close()
        _end_attempt(engine, job_id, attempt, "superseded")
        return None
    except Stop as stop:
        state, reason = stop.state, stop.reason
    except Exception as exc:  # the job failed; the worker lives on
        log.exception("job %s failed", job_id)
        state, reason = JobState.failed, f"{type(exc).__name__}: {exc} (at step {report.step})"
    written = artifacts.close()
    provenance = None
    if result is not None:
        provenance = Provenance(
            job_id=job_id,
            owner=owner.name,
            input_hash=job.input_hash,
            input_hash_version=job.hash_version,
            calculator=record.ref,
            backend=record.backend,
            parameters=record.parameters,
            weights_sha256=record.weights_sha256,
            seed=job.seed,
            attempt=attempt,
            parents=job.parents,
            artifacts=[],  # filled with ids once the artifact rows exist
            started_at=started_at,
            finished_at=utcnow(),
            compute_s=compute_s,
            **environment(loaded.backend if loaded else None, record.parameters),  # type: ignore[arg-type]
        )
    return Computed(job_id, attempt, state, reason, result, provenance, written, report)


def finish(engine: Engine, computed: Computed) -> Outcome:
    """Record the end of this attempt in one transaction (SQLAlchemy Core, as the claim),
    if it still owns the job."""
    with engine.begin() as connection:
        if _record(connection, computed):
            return Outcome(computed.state.value)
    # Superseded: nothing was written (the first update matched no row).
    _end_attempt(engine, computed.job_id, computed.attempt, "superseded")
    return Outcome("superseded")


def _record(connection: Connection, computed: Computed) -> bool:
    """Write one attempt's end in the caller's transaction; False if it was superseded."""
    job_id, attempt, state, reason = (
        computed.job_id,
        computed.attempt,
        computed.state,
        computed.reason,
    )
    result, provenance, written = computed.result, computed.provenance, computed.written
    finished_at = provenance.finished_at if provenance else utcnow()
    owned = connection.execute(
        update(Job)
        .where(*_mine(job_id, attempt))
        .values(
            state=state.value,
            finished_at=finished_at,
            error=reason,
            progress=computed.report.snapshot(),
            lease_expires_at=None,
            converged=getattr(result, "converged", None),
        )
    )
    if not owned.rowcount:
        log.warning("job %s attempt %s was superseded; not recording it", job_id, attempt)
        return False
    connection.execute(
        update(JobAttempt)
        .where(*_attempt_row(job_id, attempt))
        .values(ended_at=finished_at, outcome=state.value)
    )
    records = []
    for item in written:
        inserted = connection.execute(
            insert(Artifact).values(
                job_id=job_id,
                attempt=attempt,
                name=item.name,
                media_type=item.media_type,
                path=item.path,
                size=item.size,
                sha256=item.sha256,
                created_at=finished_at,
            )
        )
        key = inserted.inserted_primary_key
        assert key is not None
        records.append(
            ArtifactRecord(
                id=key[0],
                name=item.name,
                media_type=item.media_type,
                size=item.size,
                sha256=item.sha256,
            )
        )
    written_before = connection.execute(
        select(JobResult.job_id).where(col(JobResult.job_id) == job_id)
    ).first()
    if result is not None and provenance is not None and written_before is None:
        provenance = provenance.model_copy(update={"artifacts": records})
        connection.execute(
            insert(JobResult).values(
                job_id=job_id,
                result=result.model_dump(mode="json"),
                provenance=provenance.model_dump(mode="json"),
                created_at=finished_at,
            )
        )
        # In the same transaction, so a result is never without its audit rows.
        packages = package_rows(job_id, provenance.packages)
        if packages:
            connection.execute(insert(JobPackage), packages)
    return True
