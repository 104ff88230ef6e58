"""Routes for model-swap reports: rerun finished jobs under another calculator version."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Request

from atomq.comparisons import ComparisonCreate, ComparisonPublic
from atomq.jobs import JobState
from atomq_service import comparisons
from atomq_service.api.deps import (
    ERROR_RESPONSES,
    MAX_ID,
    CurrentUser,
    DispatcherDep,
    IdempotencyKey,
    SessionDep,
    SettingsDep,
)
from atomq_service.api.idempotency import answer_once
from atomq_service.reconciler import mark_dispatched

router = APIRouter(prefix="/v1", responses=ERROR_RESPONSES, tags=["comparisons"])

ComparisonId = Annotated[int, Path(ge=1, le=MAX_ID, description="A comparison's id.")]


@router.post("/comparisons", status_code=201)
def create_comparison(
    body: ComparisonCreate,
    user: CurrentUser,
    session: SessionDep,
    settings: SettingsDep,
    dispatcher: DispatcherDep,
    request: Request,
    idempotency_key: IdempotencyKey = None,
) -> ComparisonPublic:
    """Rerun the selected finished jobs with another calculator version, as one batch:
    every job is created, or (when any is refused) none."""

    def earlier(key: str) -> ComparisonPublic | None:
        found = comparisons.find_by_idempotency_key(session, user, key, body)
        return None if found is None else comparisons.report(session, found)

    def record() -> ComparisonPublic:
        comparison, created = comparisons.create_comparison(
            session, user, body, settings, idempotency_key
        )
        public = comparisons.report(session, comparison)
        # Commit first, then wake workers; a message lost here is re-sent by the reconciler.
        session.commit()
        # A job answered from an identical earlier result is already finished: nothing to run.
        queued = [job for job in created if job.state == JobState.queued.value]
        sent = [
            job.id
            for job in queued
            if job.id is not None and dispatcher.send(job.id, job.calculator_ref)
        ]
        if sent:
            mark_dispatched(request.app.state.engine, sent)
        return public

    return answer_once(session, "comparison", idempotency_key, earlier, record)


@router.get("/comparisons/{comparison_id}")
def get_comparison(
    comparison_id: ComparisonId, _user: CurrentUser, session: SessionDep
) -> ComparisonPublic:
    """The report as it stands: rows of candidate jobs not finished yet have no deltas."""
    return comparisons.report(session, comparisons.get_comparison(session, comparison_id))
