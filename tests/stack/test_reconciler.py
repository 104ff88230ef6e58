"""The reconciler re-sends what the broker never got: the database is the truth."""

from __future__ import annotations

from datetime import timedelta

import pytest
from ase.build import bulk
from sqlmodel import Session, select

from atomq import JobState, SinglePoint, Structure
from atomq.hashing import input_hash
from atomq_service.models import Job, User, utcnow
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack


def test_a_job_committed_but_never_sent_still_runs(redis_stack: Stack) -> None:
    # What a crash between the commit and the publish leaves behind: a queued row whose
    # message never reached the broker.
    structure = Structure.from_atoms(bulk("Cu"))
    with Session(redis_stack.engine) as session:
        owner = session.exec(select(User)).first()
        assert owner is not None and owner.id is not None
        job = Job(
            owner_id=owner.id,
            kind="single_point",
            calculator_id=1,
            calculator_ref="emt@1",
            task=SinglePoint().model_dump(mode="json"),
            structure=structure.model_dump(mode="json"),
            natoms=1,
            formula="Cu",
            input_hash=input_hash(structure, SinglePoint(), "emt@1", None),
            time_limit_s=60,
            created_at=utcnow() - timedelta(seconds=30),
        )
        session.add(job)
        session.commit()
        job_id = job.id
    assert job_id is not None
    with redis_stack.client() as client:
        info = client.job(job_id).wait(timeout=60)
    assert info.state is JobState.succeeded
    with Session(redis_stack.engine) as session:
        assert session.get(Job, job_id).dispatched_at is not None  # type: ignore[union-attr]
