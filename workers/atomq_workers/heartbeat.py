"""A worker's own record in the database: which calculator versions it serves and which
it cannot (with the reason), renewed by a heartbeat thread in Celery's main process."""

from __future__ import annotations

import json
import logging
import os
import socket
import threading

from sqlalchemy import Engine
from sqlmodel import select

from atomq_service.db import transaction
from atomq_service.models import Worker, utcnow

log = logging.getLogger(__name__)

# `atomq worker` passes what it found at start to the Celery process it becomes.
CALCULATORS_ENV = "ATOMQ_WORKER_CALCULATORS"
UNAVAILABLE_ENV = "ATOMQ_WORKER_UNAVAILABLE"
CONCURRENCY_ENV = "ATOMQ_WORKER_CONCURRENCY"


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
    between transactions it then holds no connection a forked child could inherit."""

    def __init__(self, engine: Engine, name: str, interval_s: float) -> None:
        self.engine = engine
        self.name = name
        self.interval_s = interval_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="atomq-heartbeat", daemon=True)

    def start(self) -> None:
        calculators = json.loads(os.environ.get(CALCULATORS_ENV, "[]"))
        unavailable = json.loads(os.environ.get(UNAVAILABLE_ENV, "{}"))
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
            worker.calculators = calculators
            worker.unavailable = unavailable
            worker.started_at = worker.last_seen = utcnow()
            worker.stopped_at = None
            session.add(worker)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.interval_s):
            try:
                self._touch(stopped=False)
            except Exception:  # a database hiccup must not end the heartbeat
                log.exception("worker heartbeat failed; retrying")

    def _touch(self, stopped: bool) -> None:
        with _no_fork_now, transaction(self.engine) as session:
            worker = session.exec(select(Worker).where(Worker.name == self.name)).first()
            if worker is None:
                return
            worker.last_seen = utcnow()
            if stopped:
                worker.stopped_at = worker.last_seen
            session.add(worker)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5)
        self._touch(stopped=True)
