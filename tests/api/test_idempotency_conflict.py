"""The lost race of an Idempotency-Key, made to happen on purpose, in-process.

Two tries at once can both miss the key's lookup; the second then fails on the unique
constraint. SQLite's BEGIN IMMEDIATE makes that rare, so here the lookup is made to miss
once after the first try committed: the insert must fail on the constraint, be rolled
back, and the try answered with the first record, as a retry is; nothing written twice
and nothing dispatched twice. The real race, 16 tries over HTTP on SQLite and
PostgreSQL, is tests/stack/test_idempotency_race.py. key_taken is checked against the
errors both databases really raise.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import pytest
from ase.build import bulk
from sqlalchemy import Engine, func, inspect, text
from sqlalchemy.exc import IntegrityError
from sqlmodel import Session, select

from atomq import SinglePoint, Structure
from atomq_service import batches, comparisons, jobs
from atomq_service.api.idempotency import key_taken
from atomq_service.db import make_engine
from atomq_service.models import Batch, Job, User
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.users import add_user
from atomq_workers.execute import run_job
from tests.conftest import App


@dataclass
class RecordingDispatcher:
    """Stands in for the broker: records each job id it is asked to send."""

    sent: list[int] = field(default_factory=list)

    def send(self, job_id: int, calculator_ref: str) -> bool:
        self.sent.append(job_id)
        return True

    def send_many(self, job_ids: list[int], calculator_ref: str, sizes: list[int]) -> list[int]:
        self.sent.extend(job_ids)
        return job_ids

    def close(self) -> None:
        pass


@pytest.fixture
def recorder(app: App) -> RecordingDispatcher:
    dispatcher = RecordingDispatcher()
    app.http.app.state.dispatcher = dispatcher  # type: ignore[attr-defined]
    return dispatcher


def miss_once(monkeypatch: pytest.MonkeyPatch, module: Any) -> None:
    """The next lookup of a key finds nothing, as for a try that looked before the other
    committed; later lookups are the real ones."""
    real: Callable[..., Any] = module.find_by_idempotency_key
    calls = {"n": 0}

    def lookup(*args: Any) -> Any:
        calls["n"] += 1
        return None if calls["n"] == 1 else real(*args)

    monkeypatch.setattr(module, "find_by_idempotency_key", lookup)


def row_counts(engine: Engine) -> dict[str, int]:
    with engine.connect() as connection:
        return {
            table: connection.execute(text(f'SELECT count(*) FROM "{table}"')).scalar_one()
            for table in inspect(engine).get_table_names()
        }


def copper(a: float) -> dict[str, Any]:
    return Structure.from_atoms(bulk("Cu", "fcc", a=a)).model_dump(mode="json")


def test_a_job_try_that_lost_the_race_gets_the_first_job(
    app: App, recorder: RecordingDispatcher, monkeypatch: pytest.MonkeyPatch
) -> None:
    body = {"structure": copper(3.61), "task": {"kind": "single_point"}, "calculator": "emt"}
    headers = {**app.headers, "Idempotency-Key": "lost-race-job"}
    first = app.http.post("/v1/jobs", json=body, headers=headers)
    counts = row_counts(app.engine)
    miss_once(monkeypatch, jobs)
    late = app.http.post("/v1/jobs", json=body, headers=headers)

    assert first.status_code == late.status_code == 201, late.text
    assert late.json()["id"] == first.json()["id"]
    assert row_counts(app.engine) == counts
    assert recorder.sent == [first.json()["id"]]


def test_a_lost_race_with_another_body_is_refused_as_a_retry_is(
    app: App, recorder: RecordingDispatcher, monkeypatch: pytest.MonkeyPatch
) -> None:
    body = {"structure": copper(3.61), "task": {"kind": "single_point"}, "calculator": "emt"}
    headers = {**app.headers, "Idempotency-Key": "lost-race-other"}
    first = app.http.post("/v1/jobs", json=body, headers=headers)
    counts = row_counts(app.engine)
    miss_once(monkeypatch, jobs)
    other = app.http.post("/v1/jobs", json={**body, "structure": copper(3.7)}, headers=headers)

    assert other.status_code == 422 and other.json()["code"] == "idempotency_key_reused"
    assert f"job {first.json()['id']}" in other.json()["detail"]
    assert row_counts(app.engine) == counts
    assert recorder.sent == [first.json()["id"]]


def test_a_batch_try_that_lost_the_race_gets_the_first_batch(
    app: App, recorder: RecordingDispatcher, monkeypatch: pytest.MonkeyPatch
) -> None:
    body = {
        "structures": [copper(3.55), copper(3.65)],
        "task": {"kind": "single_point"},
        "calculator": "emt",
    }
    headers = {**app.headers, "Idempotency-Key": "lost-race-batch"}
    first = app.http.post("/v1/batches", json=body, headers=headers)
    counts = row_counts(app.engine)
    sent = list(recorder.sent)
    miss_once(monkeypatch, batches)
    late = app.http.post("/v1/batches", json=body, headers=headers)

    assert first.status_code == late.status_code == 201, late.text
    assert late.json()["id"] == first.json()["id"]
    assert row_counts(app.engine) == counts
    assert recorder.sent == sent and len(sent) == 2


def test_a_comparison_try_that_lost_the_race_gets_the_first_comparison(
    app: App, recorder: RecordingDispatcher, monkeypatch: pytest.MonkeyPatch
) -> None:
    baseline = app.http.post(
        "/v1/jobs",
        json={
            "structure": copper(3.61),
            "task": {"kind": "single_point"},
            "calculator": "emt",
            "tags": ["race-baseline"],
        },
        headers=app.headers,
    ).json()["id"]
    assert run_job(app.engine, baseline, app.settings).state == "succeeded"
    body = {"tag": "race-baseline", "calculator": "morse-cu", "reuse": False}
    headers = {**app.headers, "Idempotency-Key": "lost-race-comparison"}
    first = app.http.post("/v1/comparisons", json=body, headers=headers)
    counts = row_counts(app.engine)
    sent = list(recorder.sent)
    miss_once(monkeypatch, comparisons)
    late = app.http.post("/v1/comparisons", json=body, headers=headers)

    assert first.status_code == late.status_code == 201, late.text
    assert late.json()["id"] == first.json()["id"]
    assert row_counts(app.engine) == counts
    assert recorder.sent == sent and len(sent) == 2  # the baseline and one candidate


@pytest.fixture(params=["sqlite", "postgresql"])
def engine(request: pytest.FixtureRequest, tmp_path: Any) -> Iterator[Engine]:
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'atomq.db'}"
    else:
        url = request.getfixturevalue("fresh_postgres")
    engine = make_engine(url)
    prepare_schema(engine)
    seed_defaults(engine)
    add_user(engine, f"nora-{request.param}")
    yield engine
    engine.dispose()


def insert_error(engine: Engine, row: Any) -> IntegrityError:
    with Session(engine) as session:
        session.add(row)
        with pytest.raises(IntegrityError) as raised:
            session.flush()
        return raised.value


def test_key_taken_knows_the_key_constraint_from_other_violations(engine: Engine) -> None:
    """Against the errors SQLite and PostgreSQL really raise."""
    with Session(engine) as session:
        owner_id = session.exec(select(func.max(User.id))).one()
    assert owner_id is not None

    def job(**fields: Any) -> Job:
        structure = Structure.from_atoms(bulk("Cu"))
        row: dict[str, Any] = {
            "owner_id": owner_id,
            "kind": "single_point",
            "calculator_id": 1,
            "calculator_ref": "emt@1",
            "task": SinglePoint().model_dump(mode="json"),
            "structure": structure.model_dump(mode="json"),
            "natoms": 1,
            "formula": "Cu",
            "input_hash": "0" * 64,
            "time_limit_s": 60,
        }
        return Job(**{**row, **fields})

    with Session(engine) as session:
        session.add(job(idempotency_key="taken"))
        session.add(
            Batch(
                owner_id=owner_id,
                calculator_id=1,
                calculator_ref="emt@1",
                kind="single_point",
                size=1,
                idempotency_key="taken",
            )
        )
        session.commit()

    duplicate_job = insert_error(engine, job(idempotency_key="taken"))
    assert key_taken(duplicate_job, "job")
    assert not key_taken(duplicate_job, "batch")  # another table's key
    duplicate_batch = insert_error(
        engine,
        Batch(
            owner_id=owner_id,
            calculator_id=1,
            calculator_ref="emt@1",
            kind="single_point",
            size=1,
            idempotency_key="taken",
        ),
    )
    assert key_taken(duplicate_batch, "batch")
    # Another constraint of the same table (a calculator that does not exist) stays an error.
    assert not key_taken(insert_error(engine, job(calculator_id=10**6, idempotency_key="x")), "job")
