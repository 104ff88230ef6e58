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
from typing import Any

from pydantic import TypeAdapter
from sqlalchemy import Engine, update
from sqlmodel import col

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
def claim(engine: Engine, job_id: int, settings: Settings) -> tuple[int | None, Outcome | None]:
    """Take the job for a new attempt; returns (attempt, None) or (None, why not)."""
    now = utcnow()
    with transaction(engine) as session:
        job = session.get(Job, job_id)
        if job is None:
            return None, Outcome("unknown")
        state = JobState(job.state)
        expired = job.lease_expires_at is None or job.lease_expires_at <= now
        if state is JobState.running and not expired:
            assert job.lease_expires_at is not None
            return None, Outcome("busy", (job.lease_expires_at - now).total_seconds())
        if state not in (JobState.queued, JobState.running):
            return None, Outcome("finished")
        # Read before the update: the session refreshes `job` from the UPDATE's values.
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
        changed = session.execute(
            update(Job)
            .where(
                col(Job.id) == job_id,
                col(Job.state) == seen_state,
                col(Job.attempts) == seen_attempts,
            )
            .values(**values)
        )
        if not changed.rowcount:  # type: ignore[attr-defined]
            return None, Outcome("taken")
        if seen_attempts:  # the previous attempt's worker stopped renewing: it was lost
            session.execute(
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
        session.add(
            JobAttempt(
                job_id=job_id,
                attempt=seen_attempts + 1,
                worker=values["worker"],
                started_at=now,
                lease_expires_at=values["lease_expires_at"],
            )
        )
        return seen_attempts + 1, None


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


class ProgressWriter:
    """Called by the runner after every step: stops the run when asked to (cancel, time
    limit, lost lease), and writes progress at most every `interval_s` (the first at once)."""

    def __init__(
        self,
        engine: Engine,
        job_id: int,
        attempt: int,
        lease: Lease,
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
        self.last_write = -float("inf")
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
def run_job(engine: Engine, job_id: int, settings: Settings) -> Outcome:
    """Run one delivery of a job. Never raises for a job's own error."""
    attempt, refused = claim(engine, job_id, settings)
    if attempt is None:
        assert refused is not None
        log.info("job %s: not run by this delivery (%s)", job_id, refused.state)
        return refused
    with transaction(engine) as session:
        job = session.get(Job, job_id)
        assert job is not None
        record = session.get(Calculator, job.calculator_id)
        owner = session.get(User, job.owner_id)
        assert record is not None and owner is not None
    started_at = job.started_at or utcnow()
    artifacts = ArtifactWriter(settings.artifacts_dir, job_id, attempt)
    lease = Lease(engine, job_id, attempt, settings)
    lease.start()
    report = ProgressWriter(
        engine, job_id, attempt, lease, settings.progress_interval_s, job.time_limit_s
    )
    result: ResultModel | None = None
    state, reason = JobState.succeeded, None
    loaded = None
    try:
        loaded = get_calculator(record, settings.model_cache_mb)
        task = _task_adapter.validate_python(job.task)
        atoms = (
            None if isinstance(task, NEB) else Structure.model_validate(job.structure).to_atoms()
        )
        result = run_task(atoms, loaded, task, report, artifacts)
    except Superseded:
        log.warning("job %s attempt %s lost its lease; discarding its work", job_id, attempt)
        artifacts.close()
        _end_attempt(engine, job_id, attempt, "superseded")
        return Outcome("superseded")
    except Stop as stop:
        state, reason = stop.state, stop.reason
    except Exception as exc:  # the job failed; the worker lives on
        log.exception("job %s failed", job_id)
        state, reason = JobState.failed, f"{type(exc).__name__}: {exc} (at step {report.step})"
    finally:
        lease.stop()
    written = artifacts.close()
    provenance = None
    if result is not None:
        provenance = Provenance(
            job_id=job_id,
            owner=owner.name,
            input_hash=job.input_hash,
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
            **environment(loaded.backend if loaded else None, record.parameters),  # type: ignore[arg-type]
        )
    return finish(engine, job_id, attempt, state, reason, result, provenance, written, report)


def finish(
    engine: Engine,
    job_id: int,
    attempt: int,
    state: JobState,
    reason: str | None,
    result: ResultModel | None,
    provenance: Provenance | None,
    written: list[WrittenArtifact],
    report: ProgressWriter,
) -> Outcome:
    """Record the end of this attempt in one transaction, if it still owns the job."""
    finished_at = provenance.finished_at if provenance else utcnow()
    with transaction(engine) as session:
        owned = session.execute(
            update(Job)
            .where(*_mine(job_id, attempt))
            .values(
                state=state.value,
                finished_at=finished_at,
                error=reason,
                progress=report.snapshot(),
                lease_expires_at=None,
                converged=getattr(result, "converged", None),
            )
        )
        if not owned.rowcount:  # type: ignore[attr-defined]
            log.warning("job %s attempt %s was superseded; not recording it", job_id, attempt)
            session.rollback()
            _end_attempt(engine, job_id, attempt, "superseded")
            return Outcome("superseded")
        session.execute(
            update(JobAttempt)
            .where(*_attempt_row(job_id, attempt))
            .values(ended_at=finished_at, outcome=state.value)
        )
        records = []
        for item in written:
            artifact = Artifact(
                job_id=job_id,
                attempt=attempt,
                name=item.name,
                media_type=item.media_type,
                path=item.path,
                size=item.size,
                sha256=item.sha256,
            )
            session.add(artifact)
            session.flush()
            assert artifact.id is not None
            records.append(
                ArtifactRecord(
                    id=artifact.id,
                    name=item.name,
                    media_type=item.media_type,
                    size=item.size,
                    sha256=item.sha256,
                )
            )
        written_before = session.get(JobResult, job_id) is not None
        if result is not None and provenance is not None and not written_before:
            provenance = provenance.model_copy(update={"artifacts": records})
            session.add(
                JobResult(
                    job_id=job_id,
                    result=result.model_dump(mode="json"),
                    provenance=provenance.model_dump(mode="json"),
                )
            )
            # In the same transaction, so a result is never without its audit rows.
            session.add_all(package_rows(job_id, provenance.packages))
    return Outcome(state.value)
