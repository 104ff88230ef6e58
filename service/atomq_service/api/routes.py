"""Routes under /v1: each a few lines over the job and registry modules."""

from __future__ import annotations

import asyncio
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.responses import FileResponse, Response, StreamingResponse
from sqlalchemy import Engine
from sqlmodel import Session, col, select

from atomq.jobs import CalculatorPublic, JobCreate, JobPage, JobPublic, JobState, WorkerPublic
from atomq.results import ArtifactRecord, Provenance, Result
from atomq.tasks import TaskKind
from atomq_service import events, jobs, presence, registry
from atomq_service.api.deps import (
    ERROR_RESPONSES,
    MAX_ID,
    NAME_PATTERN,
    ArtifactId,
    CurrentUser,
    DispatcherDep,
    IdempotencyKey,
    JobId,
    Label,
    SessionDep,
    SettingsDep,
    WaitSeconds,
)
from atomq_service.api.idempotency import answer_once
from atomq_service.errors import ApiError
from atomq_service.models import Calculator, Job
from atomq_service.prov import deployment_identity, prov_document
from atomq_service.reconciler import mark_dispatched

router = APIRouter(prefix="/v1", responses=ERROR_RESPONSES)
public_router = APIRouter(prefix="/v1")  # no token, no refusals to document


@public_router.get("/health", tags=["service"])
def health(session: SessionDep) -> dict[str, str]:
    session.exec(select(1)).one()
    return {"status": "ok", "database": "ok"}


@router.post("/jobs", status_code=201, tags=["jobs"])
def create_job(
    body: JobCreate,
    user: CurrentUser,
    session: SessionDep,
    settings: SettingsDep,
    dispatcher: DispatcherDep,
    request: Request,
    idempotency_key: IdempotencyKey = None,
) -> JobPublic:
    def earlier(key: str) -> JobPublic | None:
        found = jobs.find_by_idempotency_key(session, user, key, body)
        return None if found is None else jobs.to_public(session, [found])[0]

    def record() -> JobPublic:
        job = jobs.create_job(session, user, body, settings, idempotency_key)
        public = jobs.to_public(session, [job])[0]
        # The database is the truth: commit first, then send the wake-up call. If the send
        # fails, or this process dies before it, the reconciler sends it later.
        session.commit()
        assert job.id is not None
        if job.reused_from is not None:  # answered from an earlier result: nothing to run
            return public
        if dispatcher.send(job.id, job.calculator_ref):
            mark_dispatched(request.app.state.engine, [job.id])
        return public

    return answer_once(session, "job", idempotency_key, earlier, record)


@router.get("/jobs", tags=["jobs"])
def list_jobs(
    _user: CurrentUser,
    session: SessionDep,
    state: JobState | None = None,
    owner: Annotated[str | None, Query(pattern=NAME_PATTERN)] = None,
    calculator: Annotated[
        str | None, Query(pattern=NAME_PATTERN, description="'name' or 'name@version'")
    ] = None,
    kind: TaskKind | None = None,
    tag: Annotated[str | None, Query(pattern=NAME_PATTERN)] = None,
    weights_sha256: Annotated[
        str | None,
        Query(
            pattern=r"^[0-9a-fA-F]{64}$",
            description="Jobs whose calculator version uses weights with this sha256.",
        ),
    ] = None,
    package: Annotated[
        str | None,
        Query(
            pattern=r"^[A-Za-z0-9]([A-Za-z0-9._-]{0,126}[A-Za-z0-9])?$",
            description="Jobs whose result was computed with this package (a distribution "
            "name, e.g. ase or sevenn; any version). Only jobs that succeeded have one.",
        ),
    ] = None,
    package_version: Annotated[
        str | None,
        Query(
            pattern=r"^[A-Za-z0-9_.+!-]{1,64}$",
            description="With `package`: exactly this version of it, e.g. 3.23.0.",
        ),
    ] = None,
    created_after: Annotated[
        datetime | None,
        Query(description="Created at or after this time; ISO 8601 with a timezone."),
    ] = None,
    created_before: Annotated[
        datetime | None,
        Query(description="Created before this time; ISO 8601 with a timezone."),
    ] = None,
    offset: Annotated[int, Query(ge=0, le=MAX_ID)] = 0,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> JobPage:
    """Jobs matching every given filter, newest first."""
    return jobs.list_jobs(
        session,
        state=state,
        owner=owner,
        calculator=calculator,
        kind=kind,
        tag=tag,
        weights_sha256=weights_sha256,
        package=package,
        package_version=package_version,
        created_after=created_after,
        created_before=created_before,
        offset=offset,
        limit=limit,
    )


@router.get("/jobs/{job_id}", tags=["jobs"])
def get_job(job_id: JobId, _user: CurrentUser, session: SessionDep) -> JobPublic:
    return jobs.to_public(session, [jobs.get_job(session, job_id)])[0]


@router.get("/jobs/{job_id}/wait", tags=["jobs"])
async def wait_for_job(
    job_id: JobId,
    _user: CurrentUser,
    session: SessionDep,
    request: Request,
    timeout_s: WaitSeconds = 10.0,
) -> JobPublic:
    """The job once it has finished, or as it is after `timeout_s`: a client waits with
    one request instead of polling, and hears of the end within milliseconds."""
    # The token was checked; end that transaction now (on SQLite it holds the write lock,
    # which the worker needs to finish the job we are waiting for).
    session.close()
    engine = request.app.state.engine
    await _until_finished(engine, job_id, timeout_s)
    return await asyncio.to_thread(_job_now, engine, job_id)


async def _until_finished(engine: Engine, job_id: int, timeout_s: float) -> None:
    """Return once the job has finished, or after `timeout_s`."""
    loop = asyncio.get_running_loop()
    started = loop.time()
    while not await asyncio.to_thread(_has_finished, engine, job_id):
        now = loop.time()
        if now - started >= timeout_s:
            return
        # Every 3 ms for the first second (small jobs end within milliseconds; a look is
        # one indexed read), then every 50 ms.
        await asyncio.sleep(0.003 if now - started < 1.0 else 0.05)


def _has_finished(engine: Engine, job_id: int) -> bool:
    """One indexed read; 404 for no such job."""
    with engine.connect() as connection:
        state = connection.execute(select(Job.state).where(col(Job.id) == job_id)).scalar()
    if state is None:
        raise ApiError(404, "job_not_found", f"no job with id {job_id}")
    return JobState(state).finished


def _job_now(engine: Engine, job_id: int) -> JobPublic:
    with Session(engine, expire_on_commit=False) as session:
        return jobs.to_public(session, [jobs.get_job(session, job_id)])[0]


@router.post("/jobs/{job_id}/cancel", tags=["jobs"])
def cancel_job(job_id: JobId, user: CurrentUser, session: SessionDep) -> JobPublic:
    """Members cancel their own jobs; admins cancel any."""
    job = jobs.get_job(session, job_id)
    if job.owner_id != user.id and user.role != "admin":
        raise ApiError(
            403,
            "not_your_job",
            f"job {job_id} belongs to another member; only its owner or an admin can cancel it",
        )
    job = jobs.cancel_job(session, job)
    public = jobs.to_public(session, [job])[0]
    session.commit()
    return public


@router.get("/jobs/{job_id}/result", tags=["results"], response_model=Result)
async def get_result(
    job_id: JobId,
    _user: CurrentUser,
    session: SessionDep,
    request: Request,
    wait_s: WaitSeconds = 0.0,
) -> Response:
    """The job's result; 409 no_result while it has none. With `wait_s`, an unfinished
    job is first waited for that long (as /wait does), so one request both waits and
    fetches."""
    session.close()  # as in /wait: no transaction held while the worker finishes
    if wait_s > 0:
        await _until_finished(request.app.state.engine, job_id, wait_s)
    return await asyncio.to_thread(_result_now, request.app.state.engine, job_id)


def _result_now(engine: Engine, job_id: int) -> Response:
    with Session(engine, expire_on_commit=False) as session:
        text = jobs.result_json(session, jobs.get_job(session, job_id))
    return Response(content=text, media_type="application/json")


@router.get("/jobs/{job_id}/provenance", tags=["results"], response_model=Provenance)
def get_provenance(job_id: JobId, _user: CurrentUser, session: SessionDep) -> Any:
    return jobs.get_result(session, jobs.get_job(session, job_id)).provenance


@router.get("/jobs/{job_id}/lineage", tags=["provenance"])
def get_lineage(job_id: JobId, _user: CurrentUser, session: SessionDep) -> list[Provenance]:
    """Provenance of this result and of every result it was derived from."""
    return jobs.lineage(session, jobs.get_job(session, job_id))


@router.get("/jobs/{job_id}/prov-json", tags=["provenance"])
def get_prov_json(job_id: JobId, _user: CurrentUser, session: SessionDep) -> dict[str, Any]:
    """The job's lineage as a W3C PROV-JSON document."""
    records = jobs.lineage(session, jobs.get_job(session, job_id))
    return prov_document(records, deployment_identity(session))


@router.get("/prov-json", tags=["provenance"])
def get_tag_prov_json(
    tag: Annotated[str, Query(pattern=NAME_PATTERN)], _user: CurrentUser, session: SessionDep
) -> dict[str, Any]:
    """Every finished job with this tag as one W3C PROV-JSON document."""
    return prov_document(jobs.tagged_provenance(session, tag), deployment_identity(session))


@router.get("/jobs/{job_id}/artifacts", tags=["results"])
def list_artifacts(job_id: JobId, _user: CurrentUser, session: SessionDep) -> list[ArtifactRecord]:
    return [
        ArtifactRecord.model_validate(a, from_attributes=True)
        for a in jobs.list_artifacts(session, jobs.get_job(session, job_id))
    ]


@router.get(
    "/artifacts/{artifact_id}",
    tags=["results"],
    response_class=FileResponse,
    responses={
        200: {
            "content": {
                "chemical/x-extxyz": {},
                "text/csv": {},
                "application/octet-stream": {},
            }
        }
    },
)
def download_artifact(
    artifact_id: ArtifactId, _user: CurrentUser, session: SessionDep, settings: SettingsDep
) -> FileResponse:
    artifact, path = jobs.artifact_file(session, artifact_id, settings)
    return FileResponse(path, media_type=artifact.media_type, filename=artifact.name)


@router.get(
    "/jobs/{job_id}/events",
    tags=["jobs"],
    response_class=StreamingResponse,
    responses={200: {"content": {"text/event-stream": {}}}},
)
def follow_job(job_id: JobId, _user: CurrentUser, session: SessionDep, request: Request) -> Any:
    """Server-sent events: a `job` event with the job's record whenever it changes, until
    it finishes; then an `end` event."""
    jobs.get_job(session, job_id)  # 404 before the stream starts
    engine = request.app.state.engine
    return StreamingResponse(events.job_events(engine, job_id), media_type="text/event-stream")


@router.get("/calculators", tags=["calculators"])
def list_calculators(_user: CurrentUser, session: SessionDep) -> list[CalculatorPublic]:
    """Every registered version, with its job count and the live workers that can run it."""
    rows = session.exec(select(Calculator).order_by(Calculator.name, Calculator.id)).all()  # type: ignore[arg-type]
    return registry.to_public(session, rows)


@router.get("/calculators/{name}/{version}", tags=["calculators"])
def get_calculator(
    name: Label, version: Label, _user: CurrentUser, session: SessionDep
) -> CalculatorPublic:
    return registry.to_public(session, [registry.find(session, name, version)])[0]


@router.get("/workers", tags=["calculators"])
def list_workers(_user: CurrentUser, session: SessionDep) -> list[WorkerPublic]:
    """Live workers and what each can run (a worker unseen for three heartbeats is gone)."""
    return [
        WorkerPublic.model_validate(worker, from_attributes=True)
        for worker in presence.live_workers(session)
    ]
