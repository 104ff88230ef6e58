"""Routes under /v1: each a few lines over the job and registry modules."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Header, Query, Request
from fastapi.responses import FileResponse, StreamingResponse
from sqlmodel import select

from atomq.jobs import CalculatorPublic, JobCreate, JobPage, JobPublic, JobState
from atomq.results import ArtifactRecord, Provenance, Result
from atomq.tasks import TaskKind
from atomq_service import events, jobs
from atomq_service.api.deps import (
    ERROR_RESPONSES,
    MAX_ID,
    NAME_PATTERN,
    ArtifactId,
    CurrentUser,
    DispatcherDep,
    JobId,
    SessionDep,
    SettingsDep,
)
from atomq_service.errors import ApiError
from atomq_service.models import Calculator
from atomq_service.prov import prov_document
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
    idempotency_key: Annotated[
        str | None,
        Header(
            pattern=r"^[\x21-\x7e]{1,128}$",  # visible ASCII
            description="Retries with the same key return the same job.",
        ),
    ] = None,
) -> JobPublic:
    if idempotency_key is not None:
        earlier = jobs.find_by_idempotency_key(session, user, idempotency_key, body)
        if earlier is not None:
            return jobs.to_public(session, [earlier])[0]
    job = jobs.create_job(session, user, body, settings, idempotency_key)
    public = jobs.to_public(session, [job])[0]
    # The database is the truth: commit first, then send the wake-up call. If the send
    # fails, or this process dies before it, the reconciler sends it later.
    session.commit()
    assert job.id is not None
    if dispatcher.send(job.id, job.calculator_ref):
        mark_dispatched(request.app.state.engine, [job.id])
    return public


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
    offset: Annotated[int, Query(ge=0, le=MAX_ID)] = 0,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> JobPage:
    return jobs.list_jobs(
        session,
        state=state,
        owner=owner,
        calculator=calculator,
        kind=kind,
        tag=tag,
        offset=offset,
        limit=limit,
    )


@router.get("/jobs/{job_id}", tags=["jobs"])
def get_job(job_id: JobId, _user: CurrentUser, session: SessionDep) -> JobPublic:
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
def get_result(job_id: JobId, _user: CurrentUser, session: SessionDep) -> Any:
    return jobs.get_result(session, jobs.get_job(session, job_id)).result


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
    return prov_document(jobs.lineage(session, jobs.get_job(session, job_id)))


@router.get("/prov-json", tags=["provenance"])
def get_tag_prov_json(
    tag: Annotated[str, Query(pattern=NAME_PATTERN)], _user: CurrentUser, session: SessionDep
) -> dict[str, Any]:
    """Every finished job with this tag as one W3C PROV-JSON document."""
    return prov_document(jobs.tagged_provenance(session, tag))


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
    rows = session.exec(select(Calculator).order_by(Calculator.name, Calculator.id)).all()  # type: ignore[arg-type]
    return [CalculatorPublic.model_validate({**c.model_dump(), "ref": c.ref}) for c in rows]
