"""The reconciler re-sends what the broker never got: the database is the truth."""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlmodel import Session

from atomq import JobState
from atomq_service.models import Job, utcnow
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack


def test_a_job_committed_but_never_sent_still_runs(redis_stack: Stack) -> None:
    job_id = redis_stack.insert_queued_job(created_at=utcnow() - timedelta(seconds=30))
    with redis_stack.client() as client:
        info = client.job(job_id).wait(timeout=60)
    assert info.state is JobState.succeeded
    with Session(redis_stack.engine) as session:
        assert session.get(Job, job_id).dispatched_at is not None  # type: ignore[union-attr]


def test_a_message_stranded_long_ago_is_sent_again(redis_stack: Stack) -> None:
    # Sent two minutes ago but never claimed: what a worker main process killed after
    # taking the message leaves behind (the message waits in Redis's unacknowledged set
    # for the visibility timeout). The stack re-sends after 60 s.
    job_id = redis_stack.insert_queued_job(dispatched_at=utcnow() - timedelta(seconds=120))
    with redis_stack.client() as client:
        info = client.job(job_id).wait(timeout=60)
    assert info.state is JobState.succeeded
