"""Server-sent events for one job: clients follow it without polling."""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator

from sqlalchemy import Engine
from sqlmodel import Session
from starlette.concurrency import run_in_threadpool

from atomq.jobs import JobPublic
from atomq_service import jobs
from atomq_service.models import Job

POLL_S = 0.2  # the database is the truth; watching it this often costs one small read


def _read(engine: Engine, job_id: int) -> JobPublic:
    with Session(engine, expire_on_commit=False) as session:
        job = session.get(Job, job_id)
        assert job is not None
        return jobs.to_public(session, [job])[0]


async def job_events(engine: Engine, job_id: int) -> AsyncIterator[str]:
    last = None
    while True:
        info = await run_in_threadpool(_read, engine, job_id)
        text = info.model_dump_json()
        if text != last:
            last = text
            yield f"event: job\ndata: {text}\n\n"
        if info.state.finished:
            yield "event: end\ndata: {}\n\n"
            return
        await asyncio.sleep(POLL_S)
