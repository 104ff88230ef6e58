"""(2) Latency: submit -> result of a trivial job, against a bare Celery no-op round trip
on the same broker (the floor no job service can go under)."""

from __future__ import annotations

import statistics
import subprocess
import sys
import time
import uuid

from atomq import Client, SinglePoint
from atomq_workers.main import SINGLE_THREAD
from suite import profiling
from suite.floor import NOOP, QUEUE, make_app
from suite.harness import BENCH_DIR, Entry, Options, Stack, stop_process, summary, time_left
from suite.workloads import dimer

BUDGET_P50_MS = {"redis": 25.0, "embedded": 40.0}
BUDGET_P95_OVER_P50 = 3.0
PROFILED_JOBS = 50


def job_count(options: Options) -> int:
    return 30 if options.quick else 200


def floor_round_trips(stack: Stack, n: int) -> list[float]:
    """Seconds from send to result of a no-op Celery task, one at a time, on a worker
    started like atomq's (2 prefork processes, prefetch 1, one BLAS thread)."""
    env = {
        **stack.environment(),
        **SINGLE_THREAD,
        "ATOMQ_BENCH_FLOOR_BROKER": stack.broker_url,
        "PYTHONPATH": str(BENCH_DIR),
    }
    log = (stack.dir / "floor-worker.log").open("wb")
    worker = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "celery",
            "--app",
            "suite.floor:app",
            "worker",
            "--queues",
            QUEUE,
            "--concurrency",
            "2",
            "--prefetch-multiplier",
            "1",
            "--without-gossip",
            "--without-mingle",
            "--loglevel",
            "WARNING",
        ],
        cwd=BENCH_DIR,
        env=env,
        stdout=log,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    app = make_app(stack.broker_url)
    try:
        app.send_task(NOOP).get(timeout=120)  # waits for the worker to start
        for _ in range(5):
            app.send_task(NOOP).get(timeout=10)
        samples = []
        for _ in range(n):
            start = time.perf_counter()
            app.send_task(NOOP).get(timeout=10)
            samples.append(time.perf_counter() - start)
        return samples
    finally:
        app.close()
        stop_process(worker)


def service_round_trips(client: Client, n: int, offset: int) -> dict[str, list[float]]:
    """Seconds from submit to result of a 2-atom EMT single point, one at a time, and the
    phases of each from the job's own record (same clock: one machine)."""
    tag = f"bench-latency-{uuid.uuid4().hex[:8]}"
    total, submit, marks = [], [], []
    deadline = time.monotonic() + 300
    for i in range(n):
        wall = time.time()
        start = time.perf_counter()
        job = client.submit(dimer(offset + i), SinglePoint(), calculator="emt", tags=[tag])
        submitted = time.perf_counter()
        job.result(timeout=time_left(deadline))
        done = time.perf_counter()
        total.append(done - start)
        submit.append(submitted - start)
        marks.append((job.id, wall + (done - start)))
    records = {job.id: job for job in client.jobs(tag=tag, limit=1000).items}
    queue, run, notice = [], [], []
    for job_id, seen in marks:
        record = records[job_id]
        assert record.started_at is not None and record.finished_at is not None
        queue.append((record.started_at - record.created_at).total_seconds())
        run.append((record.finished_at - record.started_at).total_seconds())
        notice.append(seen - record.finished_at.timestamp())
    return {"total": total, "submit": submit, "queue": queue, "run": run, "notice": notice}


def run(stack: Stack, options: Options) -> list[Entry]:
    n = job_count(options)
    floor = floor_round_trips(stack, n)
    with stack.client() as client:
        stack.warm_up(client)
        service = service_round_trips(client, n, offset=1000)
    ms = {key: [v * 1000 for v in values] for key, values in service.items()}
    floor_ms = [v * 1000 for v in floor]
    p50 = statistics.median(ms["total"])
    p95 = summary(ms["total"])["p95"]
    floor_p50 = statistics.median(floor_ms)
    budget_p50 = BUDGET_P50_MS[stack.config]
    entry = Entry(
        "latency",
        stack.config,
        f"Cu2 EMT SP, p50 of {n}; ref: Celery no-op",
        f"{n} single points on a 2-atom Cu cluster (2.5 A apart, each a little different, no "
        "cell) submitted one at a time with client.submit(...).result(): milliseconds from "
        "submit to result, p50 and p95. Reference: a bare Celery app's no-op task on the "
        "same broker, same worker settings (2 prefork processes, prefetch 1, late acks, "
        "JSON), send -> AsyncResult.get() through Redis as result backend, same count.",
        measured=p50,
        reference=floor_p50,
        unit="ms",
        ratio=p50 / floor_p50,
        budget=f"p50 <= {budget_p50:g} ms, p95 <= {BUDGET_P95_OVER_P50:g} x p50",
        met=p50 <= budget_p50 and p95 <= BUDGET_P95_OVER_P50 * p50,
        samples={"total_ms": ms["total"], "floor_ms": floor_ms},
        derived={
            "p50_ms": p50,
            "p95_ms": p95,
            "p95_over_p50": p95 / p50,
            "floor_ms": summary(floor_ms),
            "phases_median_ms": {
                "submit (client encode, POST, validate, commit, publish)": statistics.median(
                    ms["submit"]
                ),
                "queued (created -> a worker claimed it)": statistics.median(ms["queue"]),
                "running (claimed -> result recorded)": statistics.median(ms["run"]),
                "noticed (recorded -> the client has the result: the waiting result route)": (
                    statistics.median(ms["notice"])
                ),
            },
        },
    )
    if options.profile and stack.config == "redis":
        entry.derived["profile"] = profiling.job_path(
            options.scratch, [dimer(i) for i in range(PROFILED_JOBS)], "Cu2 EMT single point"
        )
    return [entry]
