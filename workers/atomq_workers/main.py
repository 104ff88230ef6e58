"""`atomq worker`: find which registered calculators this machine can run, then start
Celery consuming exactly their queues (versions registered later are taken up by the
heartbeat, see heartbeat.py)."""

from __future__ import annotations

import json
import logging
import os
import socket
import sys

from sqlalchemy import Engine
from sqlmodel import select

from atomq_service.db import make_engine, transaction
from atomq_service.messaging import queue_name
from atomq_service.models import Calculator
from atomq_service.registry import register, seed_defaults
from atomq_service.schema import SchemaError, prepare_schema
from atomq_service.settings import Settings
from atomq_workers.backends_ml import shipped_checkpoints, tblite_records
from atomq_workers.calculators import why_not_runnable
from atomq_workers.heartbeat import (
    CALCULATORS_ENV,
    CONCURRENCY_ENV,
    SELECTION_ENV,
    UNAVAILABLE_ENV,
    selected,
)

log = logging.getLogger(__name__)

# One BLAS/OpenMP thread per prefork child: measured 30-40 % faster than the
# libraries' default threading on 2 cores, and it avoids oversubscription.
SINGLE_THREAD = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def register_shipped(engine: Engine) -> list[str]:
    """Register the checkpoints that ship inside this machine's sevenn / chgnet packages,
    and tblite's GFN methods, as calculator versions, where no record of that name@version
    exists yet (records are immutable: an existing one is never changed). Returns the refs
    added."""
    added: list[str] = []
    records = [checkpoint.record() for checkpoint in shipped_checkpoints()] + tblite_records()
    with transaction(engine) as session:
        known = {c.ref for c in session.exec(select(Calculator)).all()}
        for record in records:
            ref = f"{record['name']}@{record['version']}"
            if ref not in known:
                register(session, **record)
                added.append(ref)
    return added


def runnable_calculators(
    engine: Engine, selection: list[str] | None = None
) -> tuple[list[str], dict[str, str]]:
    """Refs of active calculators this machine can run (backend importable, weights
    present with the registered sha256), and why it cannot run the others. `selection`
    ('name' or 'name@version' entries) limits the worker to those versions."""
    with transaction(engine) as session:
        records = session.exec(select(Calculator).where(Calculator.retired == False)).all()  # noqa: E712
    runnable: list[str] = []
    skipped: dict[str, str] = {}
    for record in records:
        if not selected(record, selection or []):
            continue
        why = why_not_runnable(record)
        if why is None:
            runnable.append(record.ref)
        else:
            skipped[record.ref] = why
    return runnable, skipped


def celery_command(refs: list[str], concurrency: int, loglevel: str = "INFO") -> list[str]:
    queues = ",".join(queue_name(ref) for ref in refs)
    return [
        sys.executable,
        "-m",
        "celery",
        "--app",
        "atomq_workers.celery_app:app",
        "worker",
        "--queues",
        queues,
        "--concurrency",
        str(concurrency),
        "--prefetch-multiplier",
        "1",
        "--hostname",
        f"atomq-{os.getpid()}@{socket.gethostname()}",
        "--without-gossip",
        "--without-mingle",
        "--loglevel",
        loglevel,
    ]


def worker_environment(settings: Settings) -> dict[str, str]:
    env = dict(os.environ)
    env.update(SINGLE_THREAD)
    env["ATOMQ_DATABASE_URL"] = settings.resolved_database_url
    if settings.broker_url:
        env["ATOMQ_BROKER_URL"] = settings.broker_url
    env["ATOMQ_DATA_DIR"] = str(settings.data_dir)
    return env


def run_worker(
    settings: Settings,
    concurrency: int,
    loglevel: str = "INFO",
    selection: list[str] | None = None,
) -> None:
    """Replace this process with a Celery worker (signals then reach Celery directly)."""
    if not settings.broker_url:
        raise SystemExit(
            "atomq worker needs a broker: pass --broker redis://HOST:6379/0 or set ATOMQ_BROKER_URL"
        )
    if settings.database_url is None:
        settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url)
    try:
        prepare_schema(engine, settings)  # never upgrades: that is `atomq serve` or an admin
    except SchemaError as exc:
        raise SystemExit(f"atomq worker: {exc}") from exc
    seed_defaults(engine)
    for ref in register_shipped(engine):
        print(f"atomq worker: registered {ref}, shipped with an installed package", file=sys.stderr)
    refs, skipped = runnable_calculators(engine, selection)
    engine.dispose()
    for ref, why in skipped.items():
        print(f"atomq worker: not serving {ref}: {why}", file=sys.stderr)
    if not refs:
        wanted = f" among {', '.join(selection)}" if selection else ""
        raise SystemExit(
            f"atomq worker: no registered active calculator{wanted} can run on this machine"
        )
    print(f"atomq worker: serving {', '.join(refs)}", file=sys.stderr)
    command = celery_command(refs, concurrency, loglevel)
    env = worker_environment(settings)
    env[CALCULATORS_ENV] = json.dumps(refs)
    env[UNAVAILABLE_ENV] = json.dumps(skipped)
    env[CONCURRENCY_ENV] = str(concurrency)
    env[SELECTION_ENV] = json.dumps(selection or [])  # new versions are chosen by it too
    os.execve(sys.executable, command, env)
