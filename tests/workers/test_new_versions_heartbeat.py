"""The heartbeat takes up versions registered after the worker started, in-process: which
it checks, how often, and what it records (the real worker: tests/stack/test_new_versions)."""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from pathlib import Path

import pytest
from sqlalchemy import Engine
from sqlmodel import Session, select

from atomq_service.db import make_engine, transaction
from atomq_service.models import Calculator, Worker
from atomq_service.registry import register, seed_defaults
from atomq_service.schema import prepare_schema
from atomq_workers import heartbeat as heartbeat_module
from atomq_workers.heartbeat import (
    CALCULATORS_ENV,
    SELECTION_ENV,
    UNAVAILABLE_ENV,
    WorkerHeartbeat,
)


def until(probe: Callable[[], bool], timeout_s: float = 10) -> None:
    deadline = time.monotonic() + timeout_s
    while not probe():
        assert time.monotonic() < deadline, "timed out"
        time.sleep(0.01)


def record_of(engine: Engine, name: str) -> Worker:
    with Session(engine) as session:
        worker = session.exec(select(Worker).where(Worker.name == name)).one()
        return worker


def add_version(engine: Engine, name: str, version: str, backend: str = "emt") -> None:
    with transaction(engine) as session:
        register(session, name=name, version=version, backend=backend, elements=["Cu"])


@pytest.fixture
def engine(tmp_path: Path) -> Engine:
    engine = make_engine(f"sqlite:///{tmp_path / 'atomq.db'}", pooled=False)
    prepare_schema(engine)
    seed_defaults(engine)
    return engine


def test_new_versions_are_checked_once_consumed_and_recorded(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    with Session(engine) as session:
        at_start = [c.ref for c in session.exec(select(Calculator)).all()]
    monkeypatch.setenv(CALCULATORS_ENV, json.dumps(at_start))
    monkeypatch.setenv(UNAVAILABLE_ENV, "{}")
    monkeypatch.setenv(SELECTION_ENV, json.dumps(["emt", "morse-cu@5"]))
    checked: list[str] = []
    real_check = heartbeat_module.why_not_runnable

    def counting_check(record: Calculator) -> str | None:
        checked.append(record.ref)
        return real_check(record)

    monkeypatch.setattr(heartbeat_module, "why_not_runnable", counting_check)
    consumed: list[str] = []
    beat = WorkerHeartbeat(engine, "atomq-1@lab", interval_s=0.01, start_consuming=consumed.append)
    beat.start()
    try:
        add_version(engine, "emt", "7")  # selected by name
        add_version(engine, "morse-cu", "5", backend="morse")  # selected by ref
        add_version(engine, "morse-cu", "6", backend="morse")  # not selected
        add_version(engine, "emt", "8", backend="no-such-backend")  # selected, cannot run
        add_version(engine, "emt", "9")
        with transaction(engine) as session:
            retired = session.exec(
                select(Calculator).where(Calculator.name == "emt", Calculator.version == "9")
            ).one()
            retired.retired = True  # retired before any beat saw it: never taken up
            session.add(retired)
        until(lambda: "emt@8" in record_of(engine, "atomq-1@lab").unavailable)
        time.sleep(0.2)  # twenty more beats: nothing is checked or consumed again
    finally:
        beat.stop()

    assert consumed == ["atomq.emt@7", "atomq.morse-cu@5"]
    assert sorted(checked) == ["emt@7", "emt@8", "morse-cu@5"]
    worker = record_of(engine, "atomq-1@lab")
    assert worker.calculators == [*at_start, "emt@7", "morse-cu@5"]
    assert "no-such-backend" in worker.unavailable["emt@8"]
    assert set(worker.unavailable) == {"emt@8"}


def test_without_a_consumer_new_versions_are_left_alone(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A heartbeat that cannot add queues does not advertise versions it would not take."""
    monkeypatch.setenv(CALCULATORS_ENV, json.dumps(["emt@1"]))
    monkeypatch.delenv(SELECTION_ENV, raising=False)
    beat = WorkerHeartbeat(engine, "atomq-2@lab", interval_s=0.01)
    beat.start()
    try:
        add_version(engine, "emt", "7")
        first_seen = record_of(engine, "atomq-2@lab").last_seen
        until(lambda: record_of(engine, "atomq-2@lab").last_seen > first_seen)
    finally:
        beat.stop()
    assert record_of(engine, "atomq-2@lab").calculators == ["emt@1"]
