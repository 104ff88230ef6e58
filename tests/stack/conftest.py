"""The real stack: uvicorn and `atomq worker` (Celery prefork) in their own processes,
talking over real HTTP and a real Redis, with SQLite or PostgreSQL as the truth."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
from ase.build import bulk
from sqlalchemy import Engine
from sqlmodel import Session, select

from atomq import Client, SinglePoint, Structure
from atomq.hashing import input_hash
from atomq_service.db import make_engine
from atomq_service.embedded import api_command
from atomq_service.models import Job, User
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.users import add_user
from tests.conftest import free_port


@dataclass
class Stack:
    url: str
    token: str
    engine: Engine
    env: dict[str, str]
    log_dir: Path
    processes: list[subprocess.Popen[bytes]] = field(default_factory=list)

    def client(self) -> Client:
        return Client(self.url, self.token)

    def start_worker(
        self,
        concurrency: int = 1,
        extra_env: dict[str, str] | None = None,
        calculators: list[str] | None = None,
    ) -> None:
        log = (self.log_dir / f"worker-{len(self.processes)}.log").open("wb")
        selection = [f"--calculators={ref}" for ref in calculators or []]
        self.processes.append(
            subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "atomq.cli",
                    "worker",
                    "--concurrency",
                    str(concurrency),
                    *selection,
                ],
                env={**self.env, **(extra_env or {})},
                stdout=log,
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        )

    def stop(self) -> None:
        for process in self.processes:
            if process.poll() is None:
                os.killpg(process.pid, signal.SIGTERM)
        for process in self.processes:
            try:
                process.wait(20)
            except subprocess.TimeoutExpired:
                os.killpg(process.pid, signal.SIGKILL)
                process.wait()
        self.engine.dispose()

    def insert_queued_job(self, **fields: Any) -> int:
        """A queued Cu single point written straight to the database, with no message sent:
        what a crash between commit and publish leaves behind (fields override the row)."""
        structure = Structure.from_atoms(bulk("Cu"))
        with Session(self.engine) as session:
            owner = session.exec(select(User)).first()
            assert owner is not None and owner.id is not None
            job = Job(
                owner_id=owner.id,
                kind="single_point",
                calculator_id=1,
                calculator_ref="emt@1",
                task=SinglePoint().model_dump(mode="json"),
                structure=structure.model_dump(mode="json"),
                natoms=1,
                formula="Cu",
                input_hash=input_hash(structure, SinglePoint(), "emt@1", None),
                time_limit_s=60,
                **fields,
            )
            session.add(job)
            session.commit()
            assert job.id is not None
            return job.id

    def worker_of(self, job_id: int) -> str:
        """host:pid of the process running the job, as the database records it."""
        with Session(self.engine) as session:
            job = session.get(Job, job_id)
            assert job is not None and job.worker is not None
            return job.worker

    def logs(self) -> str:
        return "\n".join(
            f"--- {path.name}\n{path.read_text(errors='replace')[-4000:]}"
            for path in sorted(self.log_dir.glob("*.log"))
        )


def start_stack(tmp_path: Path, database_url: str, broker_url: str, workers: int = 1) -> Stack:
    """API and one worker process (with `workers` prefork children; 0: no worker process
    yet, the test starts its own), ready to take jobs."""
    import redis

    # Messages left in the broker by an earlier test name job ids of another database.
    redis.Redis.from_url(broker_url.replace("redis+socket://", "unix://")).flushdb()
    data_dir = tmp_path / "data"
    data_dir.mkdir(exist_ok=True)
    engine = make_engine(database_url)
    prepare_schema(engine)
    seed_defaults(engine)
    token = add_user(engine, "grace-member", role="member")
    port = free_port()
    env = {
        **os.environ,
        "ATOMQ_DATA_DIR": str(data_dir),
        "ATOMQ_DATABASE_URL": database_url,
        "ATOMQ_BROKER_URL": broker_url,
        "ATOMQ_PROGRESS_INTERVAL_S": "0.1",
        # A short lease, so a crashed attempt is taken over within seconds.
        "ATOMQ_LEASE_S": "2",
        "ATOMQ_RECONCILE_INTERVAL_S": "0.5",
        "ATOMQ_DISPATCH_GRACE_S": "1",
        "ATOMQ_REDISPATCH_AFTER_S": "60",
        "ATOMQ_WORKER_HEARTBEAT_S": "0.5",
    }
    log_dir = tmp_path / "logs"
    log_dir.mkdir(exist_ok=True)
    stack = Stack(f"http://127.0.0.1:{port}", token, engine, env, log_dir)
    api_log = (log_dir / "api.log").open("wb")
    stack.processes.append(
        subprocess.Popen(
            api_command("127.0.0.1", port),
            env=env,
            stdout=api_log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    )
    if workers:
        stack.start_worker(concurrency=workers)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{stack.url}/v1/health", timeout=1).status_code == 200:
                return stack
        except httpx.HTTPError:
            time.sleep(0.1)
    stack.stop()
    raise RuntimeError(f"the API did not start:\n{stack.logs()}")


@pytest.fixture
def redis_stack(tmp_path: Path, redis_url: str) -> Iterator[Stack]:
    stack = start_stack(tmp_path, f"sqlite:///{tmp_path / 'atomq.db'}", redis_url)
    yield stack
    stack.stop()


@pytest.fixture
def postgres_stack(tmp_path: Path, redis_url: str, postgres_url: str) -> Iterator[Stack]:
    stack = start_stack(tmp_path, postgres_url, redis_url)
    yield stack
    stack.stop()
