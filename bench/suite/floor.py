"""A bare Celery app with one no-op task: the floor under atomq's round trip.

Same broker and the settings atomq's messages use (JSON only, late acks, prefetch 1);
the result comes back through the same Redis as Celery's result backend. The worker runs
it with `celery --app suite.floor:app worker` (the broker URL in ATOMQ_BENCH_FLOOR_BROKER).
"""

from __future__ import annotations

import os

from celery import Celery

QUEUE = "atomq-bench.floor"
NOOP = "atomq_bench.noop"


def make_app(broker_url: str) -> Celery:
    app = Celery("atomq-bench-floor", broker=broker_url, backend=broker_url)
    app.conf.update(
        task_serializer="json",
        accept_content=["json"],
        result_serializer="json",
        task_acks_late=True,
        task_reject_on_worker_lost=True,
        worker_prefetch_multiplier=1,
        task_default_queue=QUEUE,
        broker_connection_retry_on_startup=True,
        worker_hijack_root_logger=False,
    )

    @app.task(name=NOOP)
    def noop() -> None:
        return None

    return app


app = make_app(os.environ.get("ATOMQ_BENCH_FLOOR_BROKER", "memory://"))
