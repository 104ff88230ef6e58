"""Job records: create, read, list, cancel. Routes call these; so do tests and the CLI."""

from __future__ import annotations

import hashlib
import re
import secrets
from collections import defaultdict
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from pydantic import BaseModel
from sqlalchemy import Text, cast, func
from sqlalchemy.orm import defer
from sqlmodel import Session, col, select

from atomq.hashing import HASH_VERSION, hash_of, v1_hash
from atomq.jobs import JobCreate, JobPage, JobPublic, JobState
from atomq.results import Provenance
from atomq.structure import Structure
from atomq.tasks import MD, NEB, JobReference, Task
from atomq_service import registry
from atomq_service.errors import ApiError
from atomq_service.models import (
    Artifact,
    Calculator,
    Job,
    JobPackage,
    JobResult,
    JobTag,
    User,
    utcnow,
)
from atomq_service.presence import waiting_reasons
from atomq_service.settings import Settings
from atomq_service.validation import check_job


def request_fingerprint(request: BaseModel) -> str:
    return hashlib.sha256(request.model_dump_json().encode()).hexdigest()


def find_by_idempotency_key(
    session: Session, owner: User, key: str, request: JobCreate
) -> Job | None:
    """The job an earlier try of this same submission created, if any. A key reused for a
    different submission is refused rather than silently answered with the old job."""
    earlier = session.exec(
        select(Job).where(Job.owner_id == owner.id, Job.idempotency_key == key)
    ).first()
    if earlier is not None and earlier.request_sha256 != request_fingerprint(request):
        raise ApiError(
            422,
            "idempotency_key_reused",
            f"Idempotency-Key {key!r} was already used for a different submission (job "
            f"{earlier.id}); use a new key for new work",
        )
    return earlier


def check_queue_limit(session: Session, owner: User, settings: Settings, adding: int = 1) -> None:
    """Refuse new queued work that would take the owner past the queued-or-running limit
    (a reused result queues nothing)."""
    active = session.exec(
        select(func.count())
        .select_from(Job)
        .where(
            Job.owner_id == owner.id,
            col(Job.state).in_([JobState.queued.value, JobState.running.value]),
        )
    ).one()
    if active + adding > settings.max_queued_per_user:
        asking = f" and ask for {adding} more" if adding > 1 else ""
        raise ApiError(
            429,
            "too_many_queued",
            f"you have {active} jobs queued or running{asking}; this service allows "
            f"{settings.max_queued_per_user} per user (ATOMQ_MAX_QUEUED_PER_USER); "
            "submit more when some have finished",
        )


def find_reusable(session: Session, hashes: Sequence[str]) -> tuple[Job, JobResult] | None:
    """The oldest job that computed this very input and succeeded, with its result, found
    by any of the request's hashes (its version-2 hash, and the version-1 hash of jobs
    recorded before hash versions). Only jobs that ran themselves qualify (reused_from is
    null), so a copy is never copied."""
    found = session.exec(
        select(Job, JobResult)
        .join(JobResult, col(JobResult.job_id) == col(Job.id))
        .where(
            col(Job.input_hash).in_(hashes),
            Job.state == JobState.succeeded.value,
            col(Job.reused_from).is_(None),
        )
        .order_by(col(Job.id))
        .limit(1)
    ).first()
    return None if found is None else (found[0], found[1])


def reuse_hashes(
    session: Session,
    structure: Structure,
    structure_json: dict[str, Any],
    task: Task,
    task_json: dict[str, Any],
    calculator_ref: str,
    seed: int | None,
) -> list[str]:
    """The version-1 hash a request would have had, where the database holds jobs that
    were hashed so (databases from before hash versions); empty otherwise."""
    if not has_version_1_jobs(session):
        return []
    old = v1_hash(structure, structure_json, task, task_json, calculator_ref, seed)
    return [] if old is None else [old]


# Jobs hashed by version 1 exist only in databases upgraded from before hash versions, and
# no new ones are ever written: looked up once per database and process.
_VERSION_1_JOBS: dict[str, bool] = {}


def has_version_1_jobs(session: Session) -> bool:
    url = str(session.get_bind().engine.url)
    if url not in _VERSION_1_JOBS:
        _VERSION_1_JOBS[url] = (
            session.exec(select(Job.id).where(Job.hash_version == 1).limit(1)).first() is not None
        )
    return _VERSION_1_JOBS[url]


def create_job(
    session: Session,
    owner: User,
    request: JobCreate,
    settings: Settings,
    idempotency_key: str | None = None,
) -> Job:
    """Validate and record a job. Raises ApiError before writing anything.

    The job is queued, unless its input hash matches a job that succeeded and the request
    allows reuse: then it is recorded succeeded at once with a copy of that job's result
    (reused_from names it) and must not be dispatched."""
    calculator = registry.resolve(session, request.calculator)
    task = request.task
    parents: list[int] = []
    if isinstance(task, NEB):
        initial, initial_parent = resolve_endpoint(session, task.initial, "initial")
        final, final_parent = resolve_endpoint(session, task.final, "final")
        parents = [p for p in (initial_parent, final_parent) if p is not None]
        # Store the structures themselves: the job must rerun identically even if the
        # referenced jobs are ever removed, and the input hash must cover them.
        task = task.model_copy(update={"initial": initial, "final": final})
        structures = [initial, final]
    else:
        assert request.structure is not None  # JobCreate's own validator ensures it
        structures = [request.structure]
    if isinstance(task, MD) and task.seed is None:
        # Drawn here and recorded, so every MD job can be rerun exactly.
        task = task.model_copy(update={"seed": secrets.randbits(63)})
    check_job(structures, task, calculator, settings)
    time_limit_s = request.time_limit_s or settings.max_wall_time_s
    if time_limit_s > settings.max_wall_time_s:
        raise ApiError(
            422,
            "time_limit_too_long",
            f"time_limit_s {request.time_limit_s:g} exceeds this service's limit of "
            f"{settings.max_wall_time_s:g} s (ATOMQ_MAX_WALL_TIME_S)",
        )
    tags = sorted(set(request.tags))  # their form is checked by the contract
    assert owner.id is not None and calculator.id is not None
    seed = task.seed if isinstance(task, MD) else None
    structure = structures[0]
    # Each in its JSON form once, for the hash and for the row (large structures: 0.15 s
    # per dump at 100 000 atoms).
    structure_json, task_json = structure.model_dump(mode="json"), task.model_dump(mode="json")
    hashed = hash_of(structure, structure_json, task, task_json, calculator.ref, seed)
    reusable = None
    if request.reuse:
        older = reuse_hashes(
            session, structure, structure_json, task, task_json, calculator.ref, seed
        )
        reusable = find_reusable(session, [hashed, *older])
    if reusable is None:  # only work that will queue counts against the limit
        check_queue_limit(session, owner, settings)
    job = Job(
        owner_id=owner.id,
        kind=task.kind,
        calculator_id=calculator.id,
        calculator_ref=calculator.ref,
        task=task_json,
        structure=structure_json,
        natoms=structure.natoms,
        formula=structure.chemical_formula(),
        input_hash=hashed,
        hash_version=HASH_VERSION,
        seed=seed,
        parents=parents,
        time_limit_s=time_limit_s,
        idempotency_key=idempotency_key,
        request_sha256=request_fingerprint(request),
    )
    if reusable is not None:
        original = reusable[0]
        now = utcnow()
        job.state = JobState.succeeded.value
        job.reused_from = original.id
        job.converged = original.converged
        job.created_at = job.started_at = job.finished_at = now
    session.add(job)
    session.flush()
    assert job.id is not None
    for tag in tags:
        session.add(JobTag(job_id=job.id, tag=tag))
    if reusable is not None:
        copy_result(session, job.id, *reusable)
    return job


def copy_result(session: Session, job_id: int, original: Job, stored: JobResult) -> None:
    """The original's result and provenance, unchanged: the provenance still names the job
    and worker that computed the numbers. Its package rows come along, so an audit query
    for a package version finds every job whose result that version produced."""
    session.add(JobResult(job_id=job_id, result=stored.result, provenance=stored.provenance))
    for package, version in session.exec(
        select(JobPackage.package, JobPackage.version).where(JobPackage.job_id == original.id)
    ).all():
        session.add(JobPackage(job_id=job_id, package=package, version=version))


def canonical_package(name: str) -> str:
    """A distribution name in its normal form (PEP 503: lower case, runs of - _ . as one
    -), so 'Mace_Torch' and 'mace-torch' are the same package in records and queries."""
    return re.sub(r"[-_.]+", "-", name).lower()


def package_rows(job_id: int, packages: Mapping[str, str]) -> list[dict[str, Any]]:
    """The JobPackage rows (as column values, for an insert) for a result's provenance
    `packages` (name -> version). A package the worker recorded as "not installed" has no
    version to find it by."""
    versions = {
        canonical_package(name): version
        for name, version in packages.items()
        if version != "not installed"  # atomq_workers.provenance.package_version's word
    }
    return [
        {"job_id": job_id, "package": name, "version": version}
        for name, version in sorted(versions.items())
    ]


def resolve_endpoint(
    session: Session, endpoint: Structure | JobReference, which: str
) -> tuple[Structure, int | None]:
    """An inline structure, or the final structure of a finished job (then a parent)."""
    if isinstance(endpoint, Structure):
        return endpoint, None
    job = session.get(Job, endpoint.job)
    if job is None:
        raise ApiError(422, "unknown_endpoint_job", f"NEB {which} endpoint: no job {endpoint.job}")
    stored = session.get(JobResult, endpoint.job)
    if job.state != JobState.succeeded.value or stored is None:
        raise ApiError(
            422,
            "endpoint_job_unfinished",
            f"NEB {which} endpoint: job {endpoint.job} is {job.state}; "
            "an endpoint must be a job that succeeded",
        )
    return Structure.model_validate(stored.result["structure"]), endpoint.job


def get_job(session: Session, job_id: int) -> Job:
    job = session.get(Job, job_id)
    if job is None:
        raise ApiError(404, "job_not_found", f"no job with id {job_id}")
    return job


# The Job columns JobPublic shows under the same name (read one by one, so a column the
# query deferred, such as the structure, is never loaded).
_PUBLIC_COLUMNS = [name for name in JobPublic.model_fields if name in Job.model_fields]


def to_public(session: Session, jobs: Sequence[Job]) -> list[JobPublic]:
    """Convert rows to the wire form with a fixed number of queries, never N+1."""
    if not jobs:
        return []
    ids = [job.id for job in jobs]
    owner_ids = {job.owner_id for job in jobs}
    owners = dict(session.exec(select(User.id, User.name).where(col(User.id).in_(owner_ids))).all())
    tags: dict[int, list[str]] = defaultdict(list)
    for job_id, tag in session.exec(
        select(JobTag.job_id, JobTag.tag).where(col(JobTag.job_id).in_(ids)).order_by(JobTag.tag)
    ).all():
        tags[job_id].append(tag)
    waiting = waiting_reasons(session, jobs)  # one more query, only if some are queued
    return [
        JobPublic.model_validate(
            {
                **{name: getattr(job, name) for name in _PUBLIC_COLUMNS},
                "owner": owners[job.owner_id],
                "calculator": job.calculator_ref,
                "tags": tags[job.id] if job.id is not None else [],
                "waiting_reason": waiting.get(job.id) if job.id is not None else None,
            }
        )
        for job in jobs
    ]


def _as_utc(name: str, value: datetime) -> datetime:
    """A filter time in UTC, the form timestamps are stored in (SQLite keeps no zone, so a
    value with another offset would be compared as if its wall time were UTC)."""
    if value.tzinfo is None or value.utcoffset() is None:
        raise ApiError(
            422,
            "naive_datetime",
            f"{name} {value.isoformat()} has no timezone; add one, e.g. "
            f"{value.isoformat()}Z for UTC or {value.isoformat()}+02:00",
        )
    try:
        return value.astimezone(UTC)
    except OverflowError:
        raise ApiError(
            422,
            "datetime_out_of_range",
            f"{name} {value.isoformat()} lies outside the years 1 to 9999 in UTC; "
            "give a time within them",
        ) from None


def list_jobs(
    session: Session,
    *,
    state: JobState | None = None,
    owner: str | None = None,
    calculator: str | None = None,
    kind: str | None = None,
    tag: str | None = None,
    weights_sha256: str | None = None,
    package: str | None = None,
    package_version: str | None = None,
    created_after: datetime | None = None,
    created_before: datetime | None = None,
    offset: int = 0,
    limit: int = 100,
) -> JobPage:
    """Jobs matching every given filter, newest first. Times: created_after <= created_at
    < created_before."""
    if package_version is not None and package is None:
        raise ApiError(
            422,
            "package_version_without_package",
            f"package_version {package_version!r} needs package: name the package too, "
            f"e.g. package=ase&package_version={package_version}",
        )
    after = None if created_after is None else _as_utc("created_after", created_after)
    before = None if created_before is None else _as_utc("created_before", created_before)
    if after is not None and before is not None and after >= before:
        raise ApiError(
            422,
            "empty_time_range",
            f"created_after {after.isoformat()} is not earlier than created_before "
            f"{before.isoformat()}, so no job can match; swap or widen them",
        )
    query = select(Job)
    if state is not None:
        query = query.where(Job.state == state.value)
    if owner is not None:
        query = query.join(User, col(User.id) == col(Job.owner_id)).where(User.name == owner)
    if calculator is not None:
        # 'emt' matches every version, 'emt@1' exactly that one.
        if "@" in calculator:
            query = query.where(Job.calculator_ref == calculator)
        else:  # by the versions' ids: an index range (a prefix match scanned every job)
            versions = select(Calculator.id).where(Calculator.name == calculator)
            query = query.where(col(Job.calculator_id).in_(versions))
    if kind is not None:
        query = query.where(Job.kind == kind)
    if tag is not None:
        query = query.join(JobTag, col(JobTag.job_id) == col(Job.id)).where(JobTag.tag == tag)
    if weights_sha256 is not None:
        query = query.join(Calculator, col(Calculator.id) == col(Job.calculator_id)).where(
            Calculator.weights_sha256 == weights_sha256.lower()
        )
    if package is not None:
        # (job_id, package) is the key, so the join adds at most one row per job.
        query = query.join(JobPackage, col(JobPackage.job_id) == col(Job.id)).where(
            JobPackage.package == canonical_package(package)
        )
        if package_version is not None:
            query = query.where(JobPackage.version == package_version)
    if after is not None:
        query = query.where(col(Job.created_at) >= after)
    if before is not None:
        query = query.where(col(Job.created_at) < before)
    total = session.exec(select(func.count()).select_from(query.subquery())).one()
    # The page leaves out each job's input structure (JobPublic has none; a page of large
    # structures would be decoded for nothing).
    page = query.options(defer(Job.structure))  # type: ignore[arg-type]
    rows = session.exec(page.order_by(col(Job.id).desc()).offset(offset).limit(limit)).all()
    return JobPage(items=to_public(session, rows), total=total, offset=offset, limit=limit)


def cancel_job(session: Session, job: Job) -> Job:
    """A queued job ends at once; a running one is flagged and its worker stops it."""
    state = JobState(job.state)
    if state.finished:
        raise ApiError(409, "job_finished", f"job {job.id} already ended {state.value}")
    if state is JobState.queued:
        job.state = JobState.cancelled.value
        job.finished_at = utcnow()
        job.error = "cancelled before it started"
    else:
        job.cancel_requested = True
    session.add(job)
    return job


def get_result(session: Session, job: Job) -> JobResult:
    stored = session.get(JobResult, job.id)
    if stored is None:
        raise _no_result(job)
    return stored


def result_json(session: Session, job: Job) -> str:
    """The job's result as the JSON text it was recorded as. It was validated when the
    worker wrote it; parsing and encoding it again cost more than the rest of the request
    (about 1 s for 100 000 atoms)."""
    text = session.exec(
        select(cast(col(JobResult.result), Text)).where(JobResult.job_id == job.id)
    ).first()
    if text is None:
        raise _no_result(job)
    return text


def _no_result(job: Job) -> ApiError:
    state = JobState(job.state)
    if state is JobState.succeeded:  # cannot happen: both are written in one transaction
        return ApiError(500, "result_missing", f"job {job.id} succeeded but has no result")
    reason = f": {job.error}" if job.error else ""
    return ApiError(409, "no_result", f"job {job.id} is {state.value} and has no result{reason}")


def list_artifacts(session: Session, job: Job) -> Sequence[Artifact]:
    """The files the job wrote; for a reused job, those of the job that computed the result
    (its provenance lists the same ones)."""
    source = job.id if job.reused_from is None else job.reused_from
    return session.exec(
        select(Artifact).where(Artifact.job_id == source).order_by(col(Artifact.id))
    ).all()


def artifact_file(session: Session, artifact_id: int, settings: Settings) -> tuple[Artifact, Path]:
    """The file behind an artifact id. Paths come from the database, never from a client,
    and must stay inside the artifact store."""
    artifact = session.get(Artifact, artifact_id)
    if artifact is None:
        raise ApiError(404, "artifact_not_found", f"no artifact with id {artifact_id}")
    store = settings.artifacts_dir.resolve()
    path = (store / artifact.path).resolve()
    if not path.is_relative_to(store) or not path.is_file():
        raise ApiError(
            410,
            "artifact_missing",
            f"artifact {artifact_id} ({artifact.name}) is recorded but its file is not in the "
            "artifact store; check ATOMQ_ARTIFACT_STORE on the API machine",
        )
    return artifact, path


def lineage(session: Session, job: Job) -> list[Provenance]:
    """Provenance of the job's result and of every result it was derived from, parents
    first reached breadth-first: "what produced this number"."""
    records: list[Provenance] = []
    seen: set[int] = set()
    queue = [job]
    while queue:
        current = queue.pop(0)
        if current.id is None or current.id in seen:
            continue
        seen.add(current.id)
        records.append(Provenance.model_validate(get_result(session, current).provenance))
        queue.extend(get_job(session, parent) for parent in current.parents)
    return records


def tagged_provenance(session: Session, tag: str) -> list[Provenance]:
    rows = session.exec(
        select(JobResult.provenance)
        .join(JobTag, col(JobTag.job_id) == col(JobResult.job_id))
        .where(JobTag.tag == tag)
        .order_by(col(JobResult.job_id))
    ).all()
    return [Provenance.model_validate(row) for row in rows]
