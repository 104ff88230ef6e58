"""`atomq worker`: find which registered calculators this machine can run, then start
Celery consuming exactly their queues."""

from __future__ import annotations

import logging
import os
import socket
import sys

from sqlalchemy import Engine
from sqlmodel import select

from atomq_service.db import create_schema, make_engine, transaction
from atomq_service.messaging import queue_name
from atomq_service.models import Calculator
from atomq_service.registry import seed_defaults
from atomq_service.settings import Settings
from atomq_workers.backends import BackendUnavailable, load_backend

log = logging.getLogger(__name__)

# One BLAS/OpenMP thread per prefork child: measured 30-40 % faster than the
# libraries' default threading on 2 cores, and it avoids oversubscription.
SINGLE_THREAD = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def runnable_calculators(engine: Engine) -> tuple[list[str], dict[str, str]]:
    """Refs of active calculators whose backend imports here, and why the others do not."""
    with transaction(engine) as session:
        records = session.exec(select(Calculator).where(Calculator.retired == False)).all()  # noqa: E712
    runnable: list[str] = []
    skipped: dict[str, str] = {}
    for record in records:
        try:
            backend = load_backend(record.backend)
        except BackendUnavailable as exc:
            skipped[record.ref] = str(exc)
            continue
        missing = backend.missing(record.parameters)
        if missing:
            skipped[record.ref] = f"backend {record.backend!r} needs {', '.join(missing)}"
            continue
        runnable.append(record.ref)
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


def run_worker(settings: Settings, concurrency: int, loglevel: str = "INFO") -> None:
    """Replace this process with a Celery worker (signals then reach Celery directly)."""
    if not settings.broker_url:
        raise SystemExit(
            "atomq worker needs a broker: pass --broker redis://HOST:6379/0 or set ATOMQ_BROKER_URL"
        )
    if settings.database_url is None:
        settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url)
    create_schema(engine)
    seed_defaults(engine)
    refs, skipped = runnable_calculators(engine)
    engine.dispose()
    for ref, why in skipped.items():
        print(f"atomq worker: not serving {ref}: {why}", file=sys.stderr)
    if not refs:
        raise SystemExit("atomq worker: no registered calculator can run on this machine")
    print(f"atomq worker: serving {', '.join(refs)}", file=sys.stderr)
    command = celery_command(refs, concurrency, loglevel)
    os.execve(sys.executable, command, worker_environment(settings))
