"""Which workers are alive and what they can run: read by the API for the calculator
list, the worker list and the reason a queued job is waiting."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import timedelta

from sqlmodel import Session, col, select

from atomq_service.models import Job, Worker, utcnow

# A worker unseen for this many of its own heartbeats is taken to be gone.
MISSED_HEARTBEATS = 3


def live_workers(session: Session) -> list[Worker]:
    now = utcnow()
    rows = session.exec(
        select(Worker).where(col(Worker.stopped_at).is_(None)).order_by(col(Worker.name))
    ).all()
    return [
        worker
        for worker in rows
        if worker.last_seen >= now - timedelta(seconds=MISSED_HEARTBEATS * worker.heartbeat_s)
    ]


def waiting_reasons(session: Session, jobs: Sequence[Job]) -> dict[int, str]:
    """For each queued job no live worker can run: why (one worker query for all jobs)."""
    queued = [job for job in jobs if job.state == "queued" and job.id is not None]
    if not queued:
        return {}
    workers = live_workers(session)
    reasons: dict[int, str] = {}
    for job in queued:
        assert job.id is not None
        reason = why_waiting(job.calculator_ref, workers)
        if reason is not None:
            reasons[job.id] = reason
    return reasons


def why_waiting(ref: str, workers: Sequence[Worker]) -> str | None:
    if any(ref in worker.calculators for worker in workers):
        return None  # a worker will take it when it is free
    if not workers:
        return f"no worker is running; start one with `atomq worker` to run {ref}"
    refusals = [
        f"{worker.name}: {worker.unavailable[ref]}"
        for worker in workers
        if ref in worker.unavailable
    ]
    detail = (
        "; ".join(refusals)
        if refusals
        else (
            "they were started for other calculators (`atomq worker --calculators`), or it "
            "was registered moments ago (workers take up a new version at their next heartbeat)"
        )
    )
    return f"no live worker can run {ref}: {detail}"
