"""One job, start to finish, in a worker process.

The database decides who runs a job: a worker claims it with a conditional
update (queued -> running), so a duplicate message finds nothing to do. The
result and its provenance are written in one transaction, and only if no result
exists yet, so writing twice is harmless.
"""

from __future__ import annotations

import logging
import os
import socket
import time
from datetime import datetime

from pydantic import TypeAdapter
from sqlalchemy import Engine, update
from sqlmodel import col

from atomq.jobs import JobState
from atomq.results import Provenance
from atomq.structure import Structure
from atomq.tasks import TaskSpec
from atomq_service.db import transaction
from atomq_service.models import Calculator, Job, JobResult, User, utcnow
from atomq_workers.calculators import get_calculator
from atomq_workers.provenance import environment
from atomq_workers.runners import run_task

log = logging.getLogger(__name__)

_task_adapter: TypeAdapter[TaskSpec] = TypeAdapter(TaskSpec)


class Cancelled(Exception):
    """The owner asked to stop the job."""

    def __init__(self, step: int) -> None:
        super().__init__(f"cancelled at step {step}")
        self.step = step


class ProgressWriter:
    """Writes progress to the job row at most every `interval_s` (the first report at once),
    and notices cancel requests when it writes."""

    def __init__(self, engine: Engine, job_id: int, interval_s: float) -> None:
        self.engine = engine
        self.job_id = job_id
        self.interval_s = interval_s
        self.last_write = -float("inf")
        self.step = 0
        self.latest: dict[str, object] | None = None

    def __call__(
        self, step: int, total_steps: int, energy: float | None, fmax: float | None
    ) -> None:
        self.step = step
        self.latest = {"step": step, "total_steps": total_steps, "energy": energy, "fmax": fmax}
        now = time.monotonic()
        if now - self.last_write < self.interval_s:
            return
        self.last_write = now
        with transaction(self.engine) as session:
            session.execute(
                update(Job).where(col(Job.id) == self.job_id).values(progress=self.snapshot())
            )
            job = session.get(Job, self.job_id)
            if job is not None and job.cancel_requested:
                raise Cancelled(step)

    def snapshot(self) -> dict[str, object] | None:
        """The latest report, stamped now; stored with the final state so it is never stale."""
        if self.latest is None:
            return None
        return {**self.latest, "updated_at": utcnow().isoformat()}


def claim(engine: Engine, job_id: int) -> bool:
    """Move the job from queued to running; False if another delivery already has it."""
    with transaction(engine) as session:
        claimed = session.execute(
            update(Job)
            .where(col(Job.id) == job_id, col(Job.state) == JobState.queued.value)
            .values(
                state=JobState.running.value,
                started_at=utcnow(),
                attempts=Job.attempts + 1,
                worker=_worker_name(),
            )
        )
        return bool(claimed.rowcount)  # type: ignore[attr-defined]


def _worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def run_job(engine: Engine, job_id: int, progress_interval_s: float = 1.0) -> str:
    """Run one job; returns its final state. Never raises for a job's own error."""
    if not claim(engine, job_id):
        log.info("job %s is not queued (cancelled, finished or taken); dropping message", job_id)
        return "skipped"
    with transaction(engine) as session:
        job = session.get(Job, job_id)
        assert job is not None
        record = session.get(Calculator, job.calculator_id)
        owner = session.get(User, job.owner_id)
        assert record is not None and owner is not None
    started_at = job.started_at or utcnow()
    report = ProgressWriter(engine, job_id, progress_interval_s)
    try:
        loaded = get_calculator(record)
        loaded.calculator.reset()
        structure = Structure.model_validate(job.structure)
        task = _task_adapter.validate_python(job.task)
        atoms = structure.to_atoms()
        result = run_task(atoms, loaded.calculator, task, report)
    except Cancelled as stop:
        return _finish(engine, job_id, JobState.cancelled, f"cancelled at step {stop.step}", report)
    except Exception as exc:  # the job failed; the worker lives on
        log.exception("job %s failed", job_id)
        reason = f"{type(exc).__name__}: {exc} (at step {report.step})"
        return _finish(engine, job_id, JobState.failed, reason, report)
    provenance = Provenance(
        job_id=job_id,
        owner=owner.name,
        input_hash=job.input_hash,
        calculator=record.ref,
        backend=record.backend,
        parameters=record.parameters,
        weights_sha256=record.weights_sha256,
        seed=job.seed,
        attempt=job.attempts,
        parents=[],
        artifacts=[],
        started_at=started_at,
        finished_at=utcnow(),
        **environment(loaded.backend.package),  # type: ignore[arg-type]
    )
    return _store_result(engine, job_id, result.model_dump(mode="json"), provenance, report)


def _store_result(
    engine: Engine,
    job_id: int,
    result: dict[str, object],
    provenance: Provenance,
    report: ProgressWriter,
) -> str:
    with transaction(engine) as session:
        if session.get(JobResult, job_id) is not None:
            log.info("job %s already has a result; keeping the first", job_id)
            return JobState.succeeded.value
        session.add(
            JobResult(job_id=job_id, result=result, provenance=provenance.model_dump(mode="json"))
        )
        session.execute(
            update(Job)
            .where(col(Job.id) == job_id)
            .values(
                state=JobState.succeeded.value,
                finished_at=provenance.finished_at,
                error=None,
                progress=report.snapshot(),
            )
        )
    return JobState.succeeded.value


def _finish(
    engine: Engine, job_id: int, state: JobState, reason: str, report: ProgressWriter
) -> str:
    finished: datetime = utcnow()
    with transaction(engine) as session:
        session.execute(
            update(Job)
            .where(col(Job.id) == job_id, col(Job.state) == JobState.running.value)
            .values(
                state=state.value, finished_at=finished, error=reason, progress=report.snapshot()
            )
        )
    return state.value
