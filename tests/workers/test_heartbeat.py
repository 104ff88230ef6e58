"""The worker's heartbeat runs in Celery's main process, which forks replacement
children: no fork may copy an open heartbeat connection into a child. A child that did
freed it and left the SQLite database locked for everyone (seen once in CI: a job stayed
running for five minutes after its worker was killed)."""

from __future__ import annotations

import gc
import os
import sqlite3
import time
from pathlib import Path

from atomq_service.db import make_engine
from atomq_service.schema import prepare_schema
from atomq_workers.heartbeat import WorkerHeartbeat


def child_can_write(path: Path) -> bool:
    """In a forked child: free what it inherited, then take the write lock within 5 s."""
    gc.collect()
    connection = sqlite3.connect(path, timeout=5, isolation_level=None)
    try:
        connection.execute("BEGIN IMMEDIATE")
        connection.execute("UPDATE worker SET concurrency = concurrency")
        connection.execute("COMMIT")
        return True
    except sqlite3.OperationalError:
        return False


def test_children_forked_while_the_heartbeat_runs_can_always_write(tmp_path: Path) -> None:
    path = tmp_path / "atomq.db"
    engine = make_engine(f"sqlite:///{path}", pooled=False)
    prepare_schema(engine)
    heartbeat = WorkerHeartbeat(engine, "atomq-test@host", interval_s=0.0005)
    heartbeat.start()
    try:
        failures = 0
        for _ in range(40):
            time.sleep(0.003)  # forks land at every phase of the heartbeat's transactions
            pid = os.fork()
            if pid == 0:
                os._exit(0 if child_can_write(path) else 1)
            _, status = os.waitpid(pid, 0)
            failures += os.waitstatus_to_exitcode(status) != 0
        assert failures == 0
        assert child_can_write(path), "the parent's own heartbeat must not hold the lock"
    finally:
        heartbeat.stop()
