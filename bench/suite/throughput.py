"""(1) Throughput: many small single points through the service against the same
calculations in an in-process pool of as many processes as the service has workers."""

from __future__ import annotations

import multiprocessing
import time
import uuid
from concurrent.futures import ProcessPoolExecutor
from typing import Any

from ase import Atoms

from atomq import Client, SinglePoint
from atomq.jobs import JobPublic
from suite import profiling
from suite.harness import (
    Entry,
    Options,
    Stack,
    not_available,
    summary,
    time_left,
    tree_cpu_s,
)
from suite.workloads import emt_single_point, energies_agree, rattled_cu32, single_thread

BUDGET_SINGLE = 0.90
BUDGET_BATCH = 0.95
PROFILED_JOBS = 50


def job_count(options: Options) -> int:
    return 100 if options.quick else 1000


def workload(n: int, how: str) -> str:
    return (
        f"{n} EMT single points (energy, forces, stress) on distinct 32-atom Cu fcc cells "
        f"(2x2x2 cubic, a=3.61 A, rattled 0.05 A, one seed each), {how}; 2 worker "
        "processes. Wall time from the first submission to the last result fetched, as "
        "jobs per second. Reference: the same calculations (other seeds for the batch) in a "
        "ProcessPoolExecutor of 2 single-threaded processes, warm, Atoms pickled in and "
        "results out, run just before and just after; the faster of the two."
    )


def in_pool(pool: ProcessPoolExecutor, structures: list[Atoms]) -> tuple[float, float, list[float]]:
    """(wall seconds, CPU seconds of every process involved, energies)."""
    cpu = tree_cpu_s()
    start = time.perf_counter()
    results = list(pool.map(emt_single_point, structures))
    wall = time.perf_counter() - start
    return wall, tree_cpu_s() - cpu, [energy for energy, _, _ in results]


def least_disturbed(
    before: tuple[float, float, list[float]], after: tuple[float, float, list[float]]
) -> tuple[float, float, list[float]]:
    """The pool's run before and after the service's, the faster of the two (other
    people's load only ever adds time)."""
    return min(before[0], after[0]), min(before[1], after[1]), before[2]


def through_client(client: Client, structures: list[Atoms], tag: str) -> dict[str, Any]:
    """Submit one by one as a notebook loop would, then collect every result."""
    submit_s = []
    cpu = tree_cpu_s()
    start = time.perf_counter()
    jobs = []
    for atoms in structures:
        t = time.perf_counter()
        jobs.append(client.submit(atoms, SinglePoint(), calculator="emt", tags=[tag]))
        submit_s.append(time.perf_counter() - t)
    submitted = time.perf_counter() - start
    deadline = time.monotonic() + 900
    energies = [job.result(timeout=time_left(deadline)).energy for job in jobs]
    return {
        "wall_s": time.perf_counter() - start,
        "cpu_s": tree_cpu_s() - cpu,
        "submit_phase_s": submitted,
        "submit_s": submit_s,
        "energies": energies,
    }


def through_batch(client: Client, structures: list[Atoms], tag: str) -> dict[str, Any] | str:
    """The batch route, if the client has it; else why not."""
    submit_batch = getattr(client, "submit_batch", None)
    if submit_batch is None:
        return "the client has no submit_batch yet (the batch route is being built)"
    cpu = tree_cpu_s()
    start = time.perf_counter()
    batch = submit_batch(structures, SinglePoint(), calculator="emt", tags=[tag])
    accepted = time.perf_counter() - start
    batch.wait(900)
    results = batch.results()
    return {
        "wall_s": time.perf_counter() - start,
        "cpu_s": tree_cpu_s() - cpu,
        "accept_s": accepted,
        "energies": [result.energy for result in results],
    }


def cpu_cost(service_cpu_s: float, pool_cpu_s: float, n: int) -> dict[str, float]:
    """CPU seconds both ways, counted over this process and every process it started (the
    API, the workers, an embedded Redis, the pool; the machine's Redis is not counted):
    less sensitive to other people's load than the wall time."""
    return {
        "cpu_ms_per_job_service": 1000 * service_cpu_s / n,
        "cpu_ms_per_job_pool": 1000 * pool_cpu_s / n,
        "cpu_ratio_pool_over_service": pool_cpu_s / service_cpu_s,
    }


def server_timeline(client: Client, tag: str, n: int) -> dict[str, float]:
    """From the job records: first created to last finished, and the mean time a job
    spent running in its worker (claim to result written)."""
    items: list[JobPublic] = []
    while len(items) < n:
        page = client.jobs(tag=tag, offset=len(items), limit=1000)
        items.extend(page.items)
        if not page.items:
            break
    created = min(job.created_at for job in items)
    finished = max(job.finished_at for job in items if job.finished_at is not None)
    running = [
        (job.finished_at - job.started_at).total_seconds()
        for job in items
        if job.finished_at is not None and job.started_at is not None
    ]
    return {
        "first_created_to_last_finished_s": (finished - created).total_seconds(),
        "mean_worker_run_s": sum(running) / len(running),
    }


def run(stack: Stack, options: Options) -> list[Entry]:
    n = job_count(options)
    singles = [rattled_cu32(seed) for seed in range(n)]
    batched = [rattled_cu32(seed) for seed in range(n, 2 * n)]
    entries = []
    context = multiprocessing.get_context("spawn")
    with (
        ProcessPoolExecutor(2, mp_context=context, initializer=single_thread) as pool,
        stack.client() as client,
    ):
        list(pool.map(emt_single_point, singles[:8]))  # start both processes, import ASE
        stack.warm_up(client)

        before = in_pool(pool, singles)
        tag = f"bench-throughput-{uuid.uuid4().hex[:8]}"
        service = through_client(client, singles, tag)
        after = in_pool(pool, singles)
        pool_s, pool_cpu, pool_energies = least_disturbed(before, after)
        ratio = (n / service["wall_s"]) / (n / pool_s)
        entries.append(
            Entry(
                "throughput",
                stack.config,
                f"{n} x EMT Cu32, one submit each",
                workload(n, "each submitted with client.submit in a loop"),
                measured=n / service["wall_s"],
                reference=n / pool_s,
                unit="jobs/s",
                ratio=ratio,
                budget=f">= {BUDGET_SINGLE:.2f} x pool",
                met=ratio >= BUDGET_SINGLE,
                samples={"submit_s": service["submit_s"]},
                derived={
                    "service_wall_s": service["wall_s"],
                    "pool_wall_s (before, after)": [before[0], after[0]],
                    "submit_phase_s": service["submit_phase_s"],
                    "submit_s": summary(service["submit_s"]),
                    **cpu_cost(service["cpu_s"], pool_cpu, n),
                    **server_timeline(client, tag, n),
                    "energies_vs_in_process": energies_agree(service["energies"], pool_energies),
                },
            )
        )

        before = in_pool(pool, batched)
        batch = through_batch(client, batched, f"bench-batch-{uuid.uuid4().hex[:8]}")
        after = in_pool(pool, batched)
        pool_s, pool_cpu, pool_energies = least_disturbed(before, after)
        label = f"{n} x EMT Cu32, one batch"
        if isinstance(batch, str):
            entries.append(
                not_available("throughput batch", stack.config, label, workload(n, "batch"), batch)
            )
        else:
            ratio = pool_s / batch["wall_s"]
            entries.append(
                Entry(
                    "throughput batch",
                    stack.config,
                    label,
                    workload(n, "submitted as one batch with client.submit_batch"),
                    measured=n / batch["wall_s"],
                    reference=n / pool_s,
                    unit="jobs/s",
                    ratio=ratio,
                    budget=f">= {BUDGET_BATCH:.2f} x pool",
                    met=ratio >= BUDGET_BATCH,
                    derived={
                        "service_wall_s": batch["wall_s"],
                        "pool_wall_s (before, after)": [before[0], after[0]],
                        "batch_accept_s": batch["accept_s"],
                        **cpu_cost(batch["cpu_s"], pool_cpu, n),
                        "energies_vs_in_process": energies_agree(batch["energies"], pool_energies),
                    },
                )
            )
    if options.profile and stack.config == "redis":
        entries[0].derived["profile"] = profiling.job_path(
            options.scratch, singles[:PROFILED_JOBS], "32-atom Cu EMT single point"
        )
    return entries
