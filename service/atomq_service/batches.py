"""Batches: many structures with one task and one calculator version, recorded in one
transaction as ordinary jobs plus a batch record.

The per-job path (jobs.create_job) costs a few queries per job; here the calculator is
resolved once, earlier results are looked up for all structures in a few queries, and
the jobs are inserted together, so a 10 000-structure batch is accepted in seconds.
"""

from __future__ import annotations

import math
import secrets
from collections import Counter
from collections.abc import Sequence
from typing import Any

import orjson
from sqlalchemy import Engine, Text, cast, func, insert
from sqlmodel import Session, col, select

from atomq.batches import BatchCreate, BatchPublic
from atomq.hashing import HASH_VERSION, hash_of
from atomq.jobs import JobState
from atomq.tasks import MD, Task
from atomq_service import registry
from atomq_service.errors import ApiError
from atomq_service.jobs import check_queue_limit, copy_result, request_fingerprint, reuse_hashes
from atomq_service.models import Batch, Job, JobResult, JobTag, User, utcnow
from atomq_service.presence import live_workers
from atomq_service.settings import Settings
from atomq_service.validation import check_job

# Earlier results are looked up this many input hashes per query (well below the
# bound-parameter limits of SQLite and PostgreSQL).
HASHES_PER_QUERY = 500


def find_by_idempotency_key(
    session: Session, owner: User, key: str, body: BatchCreate
) -> Batch | None:
    """The batch an earlier try of this same submission created, if any; a key reused for
    a different submission is refused."""
    earlier = session.exec(
        select(Batch).where(Batch.owner_id == owner.id, Batch.idempotency_key == key)
    ).first()
    if earlier is not None and earlier.request_sha256 != request_fingerprint(body):
        raise ApiError(
            422,
            "idempotency_key_reused",
            f"Idempotency-Key {key!r} was already used for a different batch ({earlier.id}); "
            "use a new key for new work",
        )
    return earlier


def create_batch(
    session: Session,
    owner: User,
    body: BatchCreate,
    settings: Settings,
    idempotency_key: str | None = None,
) -> Batch:
    """Validate every structure, then record the batch and its jobs. Raises ApiError (the
    structure's index in the message) before writing anything."""
    calculator = registry.resolve(session, body.calculator)
    time_limit_s = body.time_limit_s or settings.max_wall_time_s
    if time_limit_s > settings.max_wall_time_s:
        raise ApiError(
            422,
            "time_limit_too_long",
            f"time_limit_s {time_limit_s:g} exceeds this service's limit of "
            f"{settings.max_wall_time_s:g} s (ATOMQ_MAX_WALL_TIME_S)",
        )
    tasks: list[Task] = []
    for index, structure in enumerate(body.structures):
        task: Task = body.task
        if isinstance(task, MD) and task.seed is None:
            # Each structure its own recorded seed, so every run can be repeated exactly.
            task = task.model_copy(update={"seed": secrets.randbits(63)})
        try:
            check_job([structure], task, calculator, settings)
        except ApiError as error:
            raise ApiError(
                error.status_code, error.code, f"structure {index}: {error.message}"
            ) from None
        tasks.append(task)
    assert owner.id is not None and calculator.id is not None
    # Each structure and task in its JSON form once: for the input hash and for the row.
    dumped_structures = [structure.model_dump(mode="json") for structure in body.structures]
    shared_task = body.task.model_dump(mode="json")
    dumped_tasks = [
        task.model_dump(mode="json") if task is not body.task else shared_task for task in tasks
    ]
    requests = list(zip(body.structures, dumped_structures, tasks, dumped_tasks, strict=True))
    hashes = [
        hash_of(structure, dumped, task, task_json, calculator.ref, seed_of(task))
        for structure, dumped, task, task_json in requests
    ]
    earlier: dict[str, tuple[Job, JobResult]] = {}
    if body.reuse:
        # Each job's version-2 hash, and where the database holds jobs hashed by version 1
        # (from before hash versions), the version-1 hash the request would have had.
        older = [
            reuse_hashes(session, structure, dumped, task, task_json, calculator.ref, seed_of(task))
            for structure, dumped, task, task_json in requests
        ]
        found = reusable_results(session, hashes + [h for hs in older for h in hs])
        for hashed, old in zip(hashes, older, strict=True):
            matches = [found[h] for h in (hashed, *old) if h in found]
            if matches:
                earlier[hashed] = min(matches, key=lambda match: match[0].id or 0)
    to_queue = sum(1 for hashed in hashes if hashed not in earlier)
    if to_queue:
        check_queue_limit(session, owner, settings, adding=to_queue)

    batch = Batch(
        owner_id=owner.id,
        calculator_id=calculator.id,
        calculator_ref=calculator.ref,
        kind=body.task.kind,
        size=len(body.structures),
        idempotency_key=idempotency_key,
        request_sha256=request_fingerprint(body),
    )
    session.add(batch)
    session.flush()
    now = utcnow()
    rows: list[dict[str, Any]] = []
    for index, (structure, dumped, task, task_json, hashed) in enumerate(
        zip(body.structures, dumped_structures, tasks, dumped_tasks, hashes, strict=True)
    ):
        original = earlier.get(hashed)
        rows.append(
            {
                "owner_id": owner.id,
                "state": (JobState.succeeded if original else JobState.queued).value,
                "kind": task.kind,
                "calculator_id": calculator.id,
                "calculator_ref": calculator.ref,
                "task": task_json,
                "structure": dumped,
                "natoms": structure.natoms,
                "formula": structure.chemical_formula(),
                "input_hash": hashed,
                "hash_version": HASH_VERSION,
                "seed": seed_of(task),
                "parents": [],
                "time_limit_s": time_limit_s,
                "attempts": 0,
                "cancel_requested": False,
                "batch_id": batch.id,
                "batch_index": index,
                "reused_from": original[0].id if original else None,
                "converged": original[0].converged if original else None,
                "created_at": now,
                "started_at": now if original else None,
                "finished_at": now if original else None,
            }
        )
    # Plain multi-row INSERTs: building thousands of ORM objects cost more than the rest
    # of the batch together. The ids come back in the order of the rows.
    connection = session.connection()
    job_ids = list(
        connection.execute(
            insert(Job).returning(col(Job.id), sort_by_parameter_order=True), rows
        ).scalars()
    )
    tags = sorted(set(body.tags))
    if tags:
        connection.execute(
            insert(JobTag), [{"job_id": job_id, "tag": tag} for job_id in job_ids for tag in tags]
        )
    for job_id, row in zip(job_ids, rows, strict=True):
        if row["reused_from"] is not None and job_id is not None:
            copy_result(session, job_id, *earlier[row["input_hash"]])
    return batch


def seed_of(task: Task) -> int | None:
    return task.seed if isinstance(task, MD) else None


def reusable_results(session: Session, hashes: Sequence[str]) -> dict[str, tuple[Job, JobResult]]:
    """For each input hash with a job that succeeded (and computed it itself): the oldest
    such job and its result. A few queries for any number of hashes."""
    found: dict[str, tuple[Job, JobResult]] = {}
    distinct = sorted(set(hashes))
    for start in range(0, len(distinct), HASHES_PER_QUERY):
        rows = session.exec(
            select(Job, JobResult)
            .join(JobResult, col(JobResult.job_id) == col(Job.id))
            .where(
                col(Job.input_hash).in_(distinct[start : start + HASHES_PER_QUERY]),
                Job.state == JobState.succeeded.value,
                col(Job.reused_from).is_(None),
            )
            .order_by(col(Job.id))
        ).all()
        for job, stored in rows:
            found.setdefault(job.input_hash, (job, stored))
    return found


def unfinished_jobs(engine: Engine, batch_id: int) -> int:
    """How many of the batch's jobs are queued or running: one count on the (batch_id,
    state) index (0 for no such batch; the caller's get_batch then answers 404)."""
    with engine.connect() as connection:
        unfinished = [JobState.queued.value, JobState.running.value]
        return int(
            connection.execute(
                select(func.count())
                .select_from(Job)
                .where(Job.batch_id == batch_id, col(Job.state).in_(unfinished))
            ).scalar_one()
        )


def queued_job_ids(session: Session, batch: Batch) -> list[int]:
    return [
        job_id
        for job_id in session.exec(
            select(Job.id).where(Job.batch_id == batch.id, Job.state == JobState.queued.value)
        ).all()
        if job_id is not None
    ]


def message_sizes(session: Session, calculator_ref: str, jobs: int) -> list[int]:
    """Jobs per message, in sending order. One message per job costs the broker round trip
    and a worker wake-up each time; big messages leave processes idle at the end while
    one works through its last. So each message takes about an eighth of what is left per
    worker process that serves the calculator (at most 32): messages shrink as the batch
    goes and the processes finish together."""
    processes = sum(w.concurrency for w in live_workers(session) if calculator_ref in w.calculators)
    return shrinking_sizes(jobs, max(processes, 1))


def shrinking_sizes(jobs: int, processes: int, largest: int = 32) -> list[int]:
    sizes: list[int] = []
    left = jobs
    while left > 0:
        size = max(1, min(largest, math.ceil(left / (8 * processes))))
        sizes.append(size)
        left -= size
    return sizes


def get_batch(session: Session, batch_id: int) -> Batch:
    batch = session.get(Batch, batch_id)
    if batch is None:
        raise ApiError(404, "batch_not_found", f"no batch with id {batch_id}")
    return batch


def to_public(session: Session, batch: Batch) -> BatchPublic:
    owner = session.get(User, batch.owner_id)
    assert owner is not None
    counts = Counter(
        dict(
            session.exec(
                select(Job.state, func.count())
                .where(Job.batch_id == batch.id)
                .group_by(col(Job.state))
            ).all()
        )
    )
    job_ids = session.exec(
        select(Job.id).where(Job.batch_id == batch.id).order_by(col(Job.batch_index))
    ).all()
    unfinished = counts[JobState.queued.value] + counts[JobState.running.value]
    return BatchPublic(
        id=batch.id or 0,
        owner=owner.name,
        calculator=batch.calculator_ref,
        kind=batch.kind,
        size=batch.size,
        created_at=batch.created_at,
        counts=dict(counts),
        finished=unfinished == 0,
        job_ids=[job_id for job_id in job_ids if job_id is not None],
    )


def results_page_json(session: Session, batch: Batch, offset: int, limit: int) -> bytes:
    """One page of results in submission order, in the BatchResults form, two queries per
    page. Each stored result goes out as the JSON text it was recorded as (validated when
    the worker wrote it; parsing and encoding a page of results again cost more than the
    rest of the request)."""
    rows = session.exec(
        select(Job.id, Job.batch_index, Job.state, Job.error)
        .where(Job.batch_id == batch.id)
        .order_by(col(Job.batch_index))
        .offset(offset)
        .limit(limit)
    ).all()
    ids = [job_id for job_id, *_ in rows]
    results: dict[int, str] = dict(
        session.exec(
            select(JobResult.job_id, cast(col(JobResult.result), Text)).where(
                col(JobResult.job_id).in_(ids)
            )
        ).all()
    )
    page = {
        "batch_id": batch.id,
        "offset": offset,
        "limit": limit,
        "total": batch.size,
        "items": [
            {
                "job_id": job_id,
                "index": index,
                "state": state,
                "error": error,
                "result": orjson.Fragment(results[job_id]) if job_id in results else None,
            }
            for job_id, index, state, error in rows
        ],
    }
    return orjson.dumps(page)


def cancel_batch(session: Session, batch: Batch) -> int:
    """Queued jobs end at once, running ones stop at their next step; returns how many
    jobs were asked to stop."""
    jobs = session.exec(
        select(Job).where(
            Job.batch_id == batch.id,
            col(Job.state).in_([JobState.queued.value, JobState.running.value]),
        )
    ).all()
    now = utcnow()
    for job in jobs:
        if job.state == JobState.queued.value:
            job.state = JobState.cancelled.value
            job.finished_at = now
            job.error = "cancelled before it started (batch cancelled)"
        else:
            job.cancel_requested = True
        session.add(job)
    return len(jobs)
