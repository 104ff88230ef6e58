"""A worker's own record in the database: which calculator versions it serves and which
it cannot (with the reason), renewed by a heartbeat thread in Celery's main process.

The heartbeat also takes up versions registered after the worker started: each beat asks
for calculator records newer than the newest it has seen (one indexed query), checks the
new ones this worker was started for (--calculators), starts consuming the queue of each
it can run and records both kinds. Retired versions are not taken up; a version retired
while served keeps its queue, so jobs already queued for it still run.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import threading
from collections.abc import Callable, Sequence

from sqlalchemy import Engine
from sqlmodel import col, select

from atomq_service.db import transaction
from atomq_service.messaging import queue_name
from atomq_service.models import Calculator, Worker, utcnow
from atomq_workers.calculators import why_not_runnable

log = logging.getLogger(__name__)

# `atomq worker` passes what it found at start to the Celery process it becomes.
CALCULATORS_ENV = "ATOMQ_WORKER_CALCULATORS"
UNAVAILABLE_ENV = "ATOMQ_WORKER_UNAVAILABLE"
CONCURRENCY_ENV = "ATOMQ_WORKER_CONCURRENCY"
SELECTION_ENV = "ATOMQ_WORKER_SELECTION"  # --calculators, as a JSON list


def selected(record: Calculator, selection: Sequence[str]) -> bool:
    """Whether a worker started with --calculators `selection` ('name' or 'name@version'
    entries; none: every version) is meant to run this version."""
    return not selection or record.ref in selection or record.name in selection


# Held around every heartbeat transaction and taken before Celery forks a replacement
# child, so a fork never happens while the heartbeat has a connection open: a child that
# inherits an open SQLite connection (and frees it) can leave the database locked for all.
_no_fork_now = threading.Lock()
os.register_at_fork(
    before=_no_fork_now.acquire,
    after_in_parent=_no_fork_now.release,
    after_in_child=_no_fork_now.release,
)


class WorkerHeartbeat:
    """Renews the worker's record. Give it an unpooled engine (make_engine(pooled=False)):
    between transactions it then holds no connection a forked child could inherit.
    `start_consuming(queue)` makes the worker take messages from one more queue (Celery's
    consumer, in celery_app); without it new versions are not taken up."""

    def __init__(
        self,
        engine: Engine,
        name: str,
        interval_s: float,
        start_consuming: Callable[[str], None] | None = None,
    ) -> None:
        self.engine = engine
        self.name = name
        self.interval_s = interval_s
        self.start_consuming = start_consuming
        self.calculators: list[str] = []
        self.unavailable: dict[str, str] = {}
        self.selection: list[str] = []
        # Calculator records up to this id have been looked at (ids only grow).
        self._seen_up_to = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="atomq-heartbeat", daemon=True)

    def start(self) -> None:
        self.calculators = json.loads(os.environ.get(CALCULATORS_ENV, "[]"))
        self.unavailable = json.loads(os.environ.get(UNAVAILABLE_ENV, "{}"))
        self.selection = json.loads(os.environ.get(SELECTION_ENV, "[]"))
        with _no_fork_now, transaction(self.engine) as session:
            worker = session.exec(select(Worker).where(Worker.name == self.name)).first()
            if worker is None:
                worker = Worker(
                    name=self.name,
                    host=socket.gethostname(),
                    pid=os.getpid(),
                    concurrency=int(os.environ.get(CONCURRENCY_ENV, "1")),
                    heartbeat_s=self.interval_s,
                )
            worker.calculators = self.calculators
            worker.unavailable = self.unavailable
            worker.started_at = worker.last_seen = utcnow()
            worker.stopped_at = None
            session.add(worker)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.interval_s):
            try:
                new = self._touch(stopped=False)
                if new:
                    self.take_up(new)
            except Exception:  # a database hiccup must not end the heartbeat
                log.exception("worker heartbeat failed; retrying")

    def _touch(self, stopped: bool) -> list[Calculator]:
        """Renew the record; returns the versions registered since the last look that
        this worker was started for and has not checked yet."""
        with _no_fork_now, transaction(self.engine) as session:
            worker = session.exec(select(Worker).where(Worker.name == self.name)).first()
            if worker is None:
                return []
            worker.last_seen = utcnow()
            if stopped:
                worker.stopped_at = worker.last_seen
            session.add(worker)
            if stopped or self.start_consuming is None:
                return []
            records = session.exec(
                select(Calculator)
                .where(col(Calculator.id) > self._seen_up_to)
                .order_by(col(Calculator.id))
            ).all()
        if records:
            self._seen_up_to = max(record.id or 0 for record in records)
        known = {*self.calculators, *self.unavailable}
        return [
            record
            for record in records
            if not record.retired and record.ref not in known and selected(record, self.selection)
        ]

    def take_up(self, records: Sequence[Calculator]) -> None:
        """Check each new version here (outside any transaction: a weights file may take
        seconds to hash), consume the queues of those this machine can run, and record
        what it serves and why not the others."""
        assert self.start_consuming is not None
        for record in records:
            why = why_not_runnable(record)
            if why is None:
                self.start_consuming(queue_name(record.ref))
                self.calculators = [*self.calculators, record.ref]
                log.info("now serving %s, registered after this worker started", record.ref)
            else:
                self.unavailable = {**self.unavailable, record.ref: why}
                log.warning("not serving %s: %s", record.ref, why)
        with _no_fork_now, transaction(self.engine) as session:
            worker = session.exec(select(Worker).where(Worker.name == self.name)).first()
            if worker is not None:
                worker.calculators = self.calculators
                worker.unavailable = self.unavailable
                session.add(worker)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5)
        self._touch(stopped=True)
