"""The Celery application the worker processes run. Configuration lives in messaging.py."""

from __future__ import annotations

import gc
import os
from collections.abc import Callable
from functools import lru_cache

from celery import Celery
from celery.signals import worker_process_init, worker_ready, worker_shutdown
from sqlalchemy import Engine

from atomq.version import code_identity
from atomq_service.db import make_engine
from atomq_service.messaging import RUN_JOB_TASK, RUN_JOBS_TASK, celery_config
from atomq_service.settings import get_settings
from atomq_workers import execute
from atomq_workers.heartbeat import WorkerHeartbeat

settings = get_settings()
# atomq's code identity (git commit, dirty flag), worked out once in the main process
# before it forks children: every job of this worker names the code it started with.
code_identity()
app = Celery("atomq-workers")
app.conf.update(celery_config(settings.broker_url or "memory://"))


@lru_cache
def engine() -> Engine:
    return make_engine(settings.resolved_database_url)


@worker_process_init.connect
def _fresh_engine_per_child(**_kwargs: object) -> None:
    # Connections must not cross fork(); each prefork child opens its own.
    engine.cache_clear()
    # Everything imported so far (Celery, SQLAlchemy, ASE, the backends) lives as long as
    # the process: out of the collector's sight, full collections during a calculation
    # no longer walk it again and again.
    gc.freeze()


_heartbeat: WorkerHeartbeat | None = None


@worker_ready.connect
def _announce(sender: object = None, **_kwargs: object) -> None:
    # In Celery's main process only: prefork children never run the heartbeat.
    global _heartbeat
    name = str(getattr(sender, "hostname", "") or f"atomq-{os.getpid()}")
    # Its own unpooled engine: this process forks replacement children, and a child must
    # never inherit an open SQLite connection (see WorkerHeartbeat).
    heartbeat_engine = make_engine(settings.resolved_database_url, pooled=False)
    _heartbeat = WorkerHeartbeat(
        heartbeat_engine, name, settings.worker_heartbeat_s, consuming_starter(sender)
    )
    _heartbeat.start()


def consuming_starter(consumer: object) -> Callable[[str], None] | None:
    """How the heartbeat thread makes this worker consume one more queue: handed to the
    consumer's event loop (call_soon is safe from another thread), as Celery's own
    add_consumer control command does, without needing the broker's broadcast."""
    if not hasattr(consumer, "add_task_queue") or not hasattr(consumer, "call_soon"):
        return None

    def start_consuming(queue: str) -> None:
        consumer.call_soon(consumer.add_task_queue, queue)

    return start_consuming


@worker_shutdown.connect
def _withdraw(**_kwargs: object) -> None:
    if _heartbeat is not None:
        _heartbeat.stop()


@app.task(name=RUN_JOB_TASK, acks_late=True, reject_on_worker_lost=True)
def run_job(job_id: int) -> str:
    # A delivery for a job whose lease is alive elsewhere is dropped; if that attempt's
    # worker is dead, the lease expires and the service's reconciler re-sends the job.
    return execute.run_job(engine(), int(job_id), settings).state


@app.task(name=RUN_JOBS_TASK, acks_late=True, reject_on_worker_lost=True)
def run_jobs(job_ids: list[int]) -> list[str]:
    # A batch's jobs: single points claimed and recorded together, the rest one by one.
    # A redelivery after a crash skips the jobs already done (their claim is refused).
    outcomes = execute.run_single_points(engine(), [int(job_id) for job_id in job_ids], settings)
    return [outcome.state for outcome in outcomes]
