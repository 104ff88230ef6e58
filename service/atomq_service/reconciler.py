"""The reconciler: the database is the truth, the broker only carries wake-up calls.

Every few seconds it re-sends the message of
- a queued job whose message the broker never accepted (a crash between commit and
  publish, or the broker was down at submission),
- a queued job whose message was sent long ago (ATOMQ_REDISPATCH_AFTER_S) but never
  claimed: a worker main process killed after taking the message leaves it in Redis's
  unacknowledged set until the visibility timeout (an hour),
- every queued job when the broker lost its contents (Redis restarted with nothing on
  disk),
- a running job whose lease expired (its worker died; the next delivery takes it over
  as a new attempt, or ends it failed after ATOMQ_MAX_ATTEMPTS).
A duplicate message is harmless: workers claim jobs with a conditional update.
Only queued and running jobs are ever sent. A job answered at once from an earlier
result (reused_from) is recorded succeeded, has no message and no dispatched_at, and is
never sent.
"""

from __future__ import annotations

import asyncio
import logging
from datetime import timedelta

from sqlalchemy import Engine, or_, update
from sqlmodel import col, select

from atomq.jobs import JobState
from atomq_service.db import transaction
from atomq_service.messaging import Dispatcher
from atomq_service.models import Job, utcnow
from atomq_service.settings import Settings

log = logging.getLogger(__name__)


def reconcile_once(engine: Engine, dispatcher: Dispatcher, settings: Settings) -> int:
    """Re-send what needs it; returns how many messages were sent."""
    now = utcnow()
    try:
        emptied = dispatcher.broker_was_emptied()
    except Exception as exc:  # broker unreachable: nothing can be sent now anyway
        log.warning("reconciler: broker unreachable: %s", exc)
        return 0
    undispatched = col(Job.dispatched_at).is_(None) & (
        col(Job.created_at) < now - timedelta(seconds=settings.dispatch_grace_s)
    )
    stranded = col(Job.dispatched_at) < now - timedelta(seconds=settings.redispatch_after_s)
    queued = col(Job.state) == JobState.queued.value
    if not emptied:
        queued = queued & (undispatched | stranded)
    expired = (col(Job.state) == JobState.running.value) & (col(Job.lease_expires_at) < now)
    with transaction(engine) as session:
        rows = session.exec(select(Job.id, Job.calculator_ref).where(or_(queued, expired))).all()
    sent = [job_id for job_id, ref in rows if job_id is not None and dispatcher.send(job_id, ref)]
    if sent:
        mark_dispatched(engine, sent)
        log.info("reconciler: re-sent %d job(s)%s", len(sent), " (broker was emptied)" * emptied)
    return len(sent)


def mark_dispatched(engine: Engine, job_ids: list[int]) -> None:
    # A plain connection, no ORM session: this runs after every submission.
    with engine.begin() as connection:
        connection.execute(
            update(Job).where(col(Job.id).in_(job_ids)).values(dispatched_at=utcnow())
        )


async def run_forever(engine: Engine, dispatcher: Dispatcher, settings: Settings) -> None:
    while True:
        await asyncio.sleep(settings.reconcile_interval_s)
        try:
            await asyncio.to_thread(reconcile_once, engine, dispatcher, settings)
        except Exception:  # keep reconciling; a database hiccup must not end the loop
            log.exception("reconciler pass failed")
