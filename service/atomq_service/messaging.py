"""The message contract between service and workers, defined once for both.

A message carries only job ids (JSON, never pickle): one, or a few from a batch; the
jobs themselves live in the database. Each registered calculator version has its own
queue, so a worker consumes only the calculators it can run.
"""

from __future__ import annotations

import logging
from typing import Any

from celery import Celery

RUN_JOB_TASK = "atomq.run_job"
RUN_JOBS_TASK = "atomq.run_jobs"  # several job ids in one message (batches)

log = logging.getLogger(__name__)


def queue_name(calculator_ref: str) -> str:
    return f"atomq.{calculator_ref}"


def celery_config(broker_url: str) -> dict[str, Any]:
    if broker_url.startswith("sqla+"):
        # kombu's SQL transport polls once a second by default. The interval must be set
        # on the Transport class: passing it in broker_transport_options crashes.
        from kombu.transport.sqlalchemy import Transport

        Transport.polling_interval = 0.05
    return {
        "broker_url": broker_url,
        "task_serializer": "json",
        "accept_content": ["json"],  # a pickle message is refused, never executed
        "result_serializer": "json",
        "result_backend": None,  # results live in the database
        "task_ignore_result": True,
        "task_acks_late": True,  # a killed worker's job is redelivered
        "task_reject_on_worker_lost": True,
        "worker_prefetch_multiplier": 1,  # jobs are long; never hoard them
        "broker_connection_retry_on_startup": True,
        "worker_hijack_root_logger": False,
        "task_default_queue": "atomq.default",
    }


BROKER_MARKER = "atomq:broker-marker"


class Dispatcher:
    """Sends wake-up calls for committed jobs. Imports no task code."""

    def __init__(self, broker_url: str) -> None:
        self.broker_url = broker_url
        self.celery = Celery("atomq-service")
        self.celery.conf.update(celery_config(broker_url))

    def broker_was_emptied(self) -> bool:
        """True once after the broker lost its contents (a Redis restarted with nothing on
        disk, or the first look at a new broker): every queued job must then be re-sent.
        Brokers other than Redis are never reported as emptied."""
        if not self.broker_url.startswith(("redis://", "rediss://", "redis+socket://")):
            return False
        import redis

        url = self.broker_url.replace("redis+socket://", "unix://")
        client = redis.Redis.from_url(url, socket_timeout=2)
        try:
            # SET NX writes the marker only if it is missing, i.e. the broker is new.
            return bool(client.set(BROKER_MARKER, "1", nx=True))
        finally:
            client.close()

    def send(self, job_id: int, calculator_ref: str) -> bool:
        """Publish; on failure the job stays queued in the database for re-dispatch."""
        try:
            self.celery.send_task(
                RUN_JOB_TASK, args=[job_id], queue=queue_name(calculator_ref), retry=False
            )
        except Exception as exc:  # the broker may be down; the job is safe in the database
            log.warning("could not dispatch job %s: %s", job_id, exc)
            return False
        return True

    def send_many(self, job_ids: list[int], calculator_ref: str, sizes: list[int]) -> list[int]:
        """Publish the jobs in messages of the given sizes, in order; returns the ids whose
        message the broker took (the others stay queued in the database for the
        reconciler)."""
        sent: list[int] = []
        queue = queue_name(calculator_ref)
        try:
            with self.celery.producer_or_acquire() as producer:  # one connection for all
                start = 0
                for size in sizes:
                    chunk, start = job_ids[start : start + size], start + size
                    if not chunk:
                        break
                    task, args = (
                        (RUN_JOB_TASK, chunk) if len(chunk) == 1 else (RUN_JOBS_TASK, [chunk])
                    )
                    self.celery.send_task(
                        task, args=args, queue=queue, retry=False, producer=producer
                    )
                    sent.extend(chunk)
        except Exception as exc:  # the broker may be down; the jobs are safe in the database
            log.warning("could not dispatch %d job(s): %s", len(job_ids) - len(sent), exc)
        return sent

    def close(self) -> None:
        self.celery.close()
