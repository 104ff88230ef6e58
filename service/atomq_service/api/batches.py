"""Routes for batches: submit many structures at once, follow them, fetch results in bulk."""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Coroutine
from typing import Annotated, Any

from fastapi import APIRouter, Path, Query, Request, Response
from fastapi.routing import APIRoute
from sqlalchemy import Engine
from sqlmodel import Session

from atomq.batches import BatchCreate, BatchPublic, BatchResults
from atomq.bulk import collector_paused
from atomq_service import batches
from atomq_service.api.deps import (
    ERROR_RESPONSES,
    MAX_ID,
    CurrentUser,
    DispatcherDep,
    IdempotencyKey,
    SessionDep,
    SettingsDep,
    WaitSeconds,
)
from atomq_service.api.idempotency import answer_once
from atomq_service.errors import ApiError
from atomq_service.reconciler import mark_dispatched

router = APIRouter(prefix="/v1", responses=ERROR_RESPONSES, tags=["batches"])

BatchId = Annotated[int, Path(ge=1, le=MAX_ID, description="A batch's id.")]


class CollectorPausedRoute(APIRoute):
    """A route whose request is parsed, validated and recorded with Python's cyclic
    collector paused (atomq.bulk): a batch body is millions of small objects, and
    collections walking them again and again cost a third of accepting it."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def paused(request: Request) -> Response:
            with collector_paused():
                return await handler(request)

        return paused


def create_batch(
    body: BatchCreate,
    user: CurrentUser,
    session: SessionDep,
    settings: SettingsDep,
    dispatcher: DispatcherDep,
    request: Request,
    idempotency_key: IdempotencyKey = None,
) -> BatchPublic:
    """Every structure becomes a job with the same task and calculator version; all are
    recorded, or (when any structure is refused, named by its index) none."""

    def earlier(key: str) -> BatchPublic | None:
        found = batches.find_by_idempotency_key(session, user, key, body)
        return None if found is None else batches.to_public(session, found)

    def record() -> BatchPublic:
        batch = batches.create_batch(session, user, body, settings, idempotency_key)
        public = batches.to_public(session, batch)
        queued = batches.queued_job_ids(session, batch)
        sizes = batches.message_sizes(session, batch.calculator_ref, len(queued))
        # Commit first, then wake workers; a message lost here is re-sent by the reconciler.
        session.commit()
        sent = dispatcher.send_many(queued, batch.calculator_ref, sizes)
        if sent:
            mark_dispatched(request.app.state.engine, sent)
        return public

    return answer_once(session, "batch", idempotency_key, earlier, record)


router.add_api_route(
    "/batches",
    create_batch,
    methods=["POST"],
    status_code=201,
    route_class_override=CollectorPausedRoute,
)


@router.get("/batches/{batch_id}")
def get_batch(batch_id: BatchId, _user: CurrentUser, session: SessionDep) -> BatchPublic:
    """The batch with its jobs counted by state."""
    return batches.to_public(session, batches.get_batch(session, batch_id))


@router.get("/batches/{batch_id}/wait")
async def wait_for_batch(
    batch_id: BatchId,
    _user: CurrentUser,
    session: SessionDep,
    request: Request,
    timeout_s: WaitSeconds = 10.0,
) -> BatchPublic:
    """The batch once every job has finished, or as it is after `timeout_s`: one request
    instead of polling, and the end heard within milliseconds."""
    # The token was checked; end that transaction (on SQLite it holds the write lock the
    # workers need to finish the jobs we are waiting for).
    session.close()
    engine = request.app.state.engine
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout_s
    while True:
        unfinished = await asyncio.to_thread(batches.unfinished_jobs, engine, batch_id)
        if unfinished == 0 or loop.time() >= deadline:
            return await asyncio.to_thread(_batch_now, engine, batch_id)
        # Look rarely while many jobs remain (each look costs the API process CPU the
        # workers could use: at 1e-5 s per unfinished job the looks took a fifth of a
        # core through a 1000-job batch), every few ms near the end.
        await asyncio.sleep(min(0.5, 0.003 + 2e-4 * unfinished))


def _batch_now(engine: Engine, batch_id: int) -> BatchPublic:
    with Session(engine, expire_on_commit=False) as session:
        return batches.to_public(session, batches.get_batch(session, batch_id))


@router.get("/batches/{batch_id}/results", response_model=BatchResults)
def get_batch_results(
    batch_id: BatchId,
    _user: CurrentUser,
    session: SessionDep,
    offset: Annotated[int, Query(ge=0, le=MAX_ID)] = 0,
    limit: Annotated[int, Query(ge=1, le=1000)] = 500,
) -> Response:
    """Results in submission order; a job not succeeded has its state and error only."""
    page = batches.results_page_json(session, batches.get_batch(session, batch_id), offset, limit)
    return Response(content=page, media_type="application/json")


@router.post("/batches/{batch_id}/cancel")
def cancel_batch(batch_id: BatchId, user: CurrentUser, session: SessionDep) -> BatchPublic:
    """Members cancel their own batches; admins cancel any."""
    batch = batches.get_batch(session, batch_id)
    if batch.owner_id != user.id and user.role != "admin":
        raise ApiError(
            403,
            "not_your_batch",
            f"batch {batch_id} belongs to another member; only its owner or an admin can cancel it",
        )
    batches.cancel_batch(session, batch)
    public = batches.to_public(session, batch)
    session.commit()
    return public
