"""Sixteen tries of one submission at the same moment, with one Idempotency-Key.

A client that times out and retries while its first try is still being recorded sends
the same key twice at once. Every try must get what a plain retry gets (the first
record, 201), never a 5xx, and the work must be recorded and dispatched once. On
PostgreSQL the tries really overlap (each its own connection, READ COMMITTED); on SQLite
BEGIN IMMEDIATE serialises them, which the same checks confirm.
"""

from __future__ import annotations

import base64
import json
import threading
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import pytest
import redis
from ase.build import bulk
from sqlalchemy import func
from sqlmodel import Session, col, select

from atomq import BatchCreate, JobCreate, SinglePoint, Structure
from atomq_service.messaging import BROKER_MARKER, queue_name
from atomq_service.models import Batch, Job
from tests.stack.conftest import Stack, start_stack

pytestmark = pytest.mark.stack

TRIES = 16


@pytest.fixture(params=["sqlite", "postgresql"])
def stack(request: pytest.FixtureRequest, tmp_path: Path, redis_url: str) -> Iterator[Stack]:
    """API only (no worker), so every message sent stays in the broker to be counted."""
    if request.param == "sqlite":
        database_url = f"sqlite:///{tmp_path / 'atomq.db'}"
    else:
        database_url = request.getfixturevalue("postgres_url")
    stack = start_stack(tmp_path, database_url, redis_url, workers=0)
    # The broker was emptied for this test; mark it as seen, or the reconciler's first
    # look would re-send every queued job and the messages could not be counted.
    with broker_of(stack) as broker:
        broker.set(BROKER_MARKER, "1")
    yield stack
    stack.stop()


@contextmanager
def broker_of(stack: Stack) -> Iterator[redis.Redis]:
    broker = redis.Redis.from_url(
        stack.env["ATOMQ_BROKER_URL"].replace("redis+socket://", "unix://")
    )
    try:
        yield broker
    finally:
        broker.close()


def post_at_once(stack: Stack, path: str, bodies: list[str], key: str) -> list[httpx.Response]:
    """Each body POSTed from its own thread and connection, all released together."""
    headers = {
        "Authorization": f"Bearer {stack.token}",
        "Content-Type": "application/json",
        "Idempotency-Key": key,
    }
    start = threading.Barrier(len(bodies))

    def post(body: str) -> httpx.Response:
        with httpx.Client(base_url=stack.url, timeout=60) as http:
            http.get("/v1/health")  # connected before the barrier, so the POSTs overlap
            start.wait()
            return http.post(path, content=body, headers=headers)

    with ThreadPoolExecutor(max_workers=len(bodies)) as pool:
        return list(pool.map(post, bodies))


def job_ids_sent(stack: Stack, calculator_ref: str) -> list[int]:
    """The job ids of every message waiting in the calculator's queue (Celery's JSON body:
    [args, kwargs, embed]; run_job takes one id, run_jobs a list)."""
    with broker_of(stack) as broker:
        messages = broker.lrange(queue_name(calculator_ref), 0, -1)
    ids: list[int] = []
    for message in messages:
        args = json.loads(base64.b64decode(json.loads(message)["body"]))[0]
        ids.extend(args[0] if isinstance(args[0], list) else args)
    return ids


def copper(a: float = 3.61) -> Structure:
    return Structure.from_atoms(bulk("Cu", "fcc", a=a))


def count(stack: Stack, table: type[Job] | type[Batch]) -> int:
    """Rows in the table (the PostgreSQL database is shared by the session's stacks, so
    tests compare counts before and after rather than expect an empty table)."""
    with Session(stack.engine) as session:
        return session.exec(select(func.count()).select_from(table)).one()


def test_one_key_at_once_gives_one_job(stack: Stack) -> None:
    body = JobCreate(structure=copper(), task=SinglePoint(), calculator="emt").model_dump_json()
    jobs_before = count(stack, Job)
    answers = post_at_once(stack, "/v1/jobs", [body] * TRIES, "race-job-1")

    assert [a.status_code for a in answers] == [201] * TRIES, [a.text for a in answers]
    named = {a.json()["id"] for a in answers}
    with Session(stack.engine) as session:
        rows = session.exec(select(Job.id).where(Job.idempotency_key == "race-job-1")).all()
    assert len(rows) == 1 and count(stack, Job) == jobs_before + 1
    assert named == set(rows)
    assert job_ids_sent(stack, "emt@1") == rows  # dispatched once, by the try that won


def test_one_key_for_two_different_bodies_answers_the_winner_or_refuses(stack: Stack) -> None:
    """Half the tries ask for another structure under the same key: whichever body was
    recorded first, tries with that body get its job and the others a 422 naming the key,
    as a later retry would."""
    structure = copper(3.61)
    first = JobCreate(structure=structure, task=SinglePoint(), calculator="emt")
    second = JobCreate(structure=copper(3.70), task=SinglePoint(), calculator="emt")
    bodies = [first.model_dump_json(), second.model_dump_json()] * (TRIES // 2)
    jobs_before = count(stack, Job)
    answers = post_at_once(stack, "/v1/jobs", bodies, "race-job-2")

    with Session(stack.engine) as session:
        winner = session.exec(select(Job).where(Job.idempotency_key == "race-job-2")).one()
    assert count(stack, Job) == jobs_before + 1
    won_first = winner.structure == structure.model_dump(mode="json")
    winning_body = bodies[0] if won_first else bodies[1]
    for body, answer in zip(bodies, answers, strict=True):
        if body == winning_body:
            assert answer.status_code == 201 and answer.json()["id"] == winner.id, answer.text
        else:
            assert answer.status_code == 422, answer.text
            assert answer.json()["code"] == "idempotency_key_reused"
    assert job_ids_sent(stack, "emt@1") == [winner.id]


def test_one_key_at_once_gives_one_batch(stack: Stack) -> None:
    cells = [copper(a) for a in (3.55, 3.60, 3.65)]
    body = BatchCreate(structures=cells, task=SinglePoint(), calculator="emt").model_dump_json()
    batches_before, jobs_before = count(stack, Batch), count(stack, Job)
    answers = post_at_once(stack, "/v1/batches", [body] * TRIES, "race-batch-1")

    assert [a.status_code for a in answers] == [201] * TRIES, [a.text for a in answers]
    named: set[Any] = {a.json()["id"] for a in answers}
    with Session(stack.engine) as session:
        batch_ids = session.exec(
            select(Batch.id).where(Batch.idempotency_key == "race-batch-1")
        ).all()
        job_ids = session.exec(
            select(Job.id).where(col(Job.batch_id).in_(batch_ids)).order_by(col(Job.id))
        ).all()
    assert len(batch_ids) == 1 and named == set(batch_ids)
    assert count(stack, Batch) == batches_before + 1
    assert len(job_ids) == len(cells) and count(stack, Job) == jobs_before + len(cells)
    assert sorted(job_ids_sent(stack, "emt@1")) == job_ids  # each job sent once
