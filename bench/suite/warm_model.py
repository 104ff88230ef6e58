"""(4) Warm model: two successive SevenNet single points on one worker process; the second
finds the model loaded and should cost little more than the computation itself."""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import time
from importlib.util import find_spec
from typing import Any

from ase import Atoms
from ase.build import bulk

from atomq import SinglePoint
from atomq.errors import NotFound
from atomq_workers.main import SINGLE_THREAD
from suite.harness import BENCH_DIR, Entry, Options, Stack, not_available, stop_process
from suite.workloads import CU_A

BUDGET = 1.1
CALCULATOR = "sevennet-0@2024-07-11"
LABEL = "SevenNet-0 Cu64, warm calls on 1 worker"
WARM_CALLS = 3  # after the first, which loads the model


def cu64(seed: int) -> Atoms:
    """64 Cu atoms (4x4x1 fcc cubic, a=3.61 A) rattled 0.02 A: a distinct cell per seed."""
    atoms: Atoms = bulk("Cu", "fcc", a=CU_A, cubic=True).repeat((4, 4, 1))
    atoms.rattle(0.02, seed=seed)
    return atoms


# In a fresh process with the worker's environment (one thread): load the model the way a
# worker does (the backend's make with the registered parameters), then time single points
# on distinct cells: energy, forces and stress, what the worker's single point reads.
REFERENCE = r"""
import json, sys, time
sys.path.insert(0, sys.argv[2])
from atomq_workers.backends import load_backend
from suite.warm_model import cu64
backend_name, parameters, calls = json.loads(sys.argv[1])
backend = load_backend(backend_name)
start = time.perf_counter()
calculator = backend.make(parameters, backend.weights_file(parameters, None))
load_s = time.perf_counter() - start
times = []
for seed in range(100, 101 + calls):
    atoms = cu64(seed)
    atoms.calc = calculator
    start = time.perf_counter()
    atoms.get_potential_energy(), atoms.get_forces(), atoms.get_stress()
    times.append(time.perf_counter() - start)
print("RESULT " + json.dumps({"load_s": load_s, "first_call_s": times[0], "calls_s": times[1:]}))
"""


def pure_compute(stack: Stack, backend: str, parameters: dict[str, Any], calls: int) -> Any:
    child = subprocess.run(
        [sys.executable, "-c", REFERENCE, json.dumps([backend, parameters, calls]), str(BENCH_DIR)],
        env={**stack.environment(), **SINGLE_THREAD},
        capture_output=True,
        text=True,
        timeout=900,
    )
    for line in child.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"the in-process reference failed: {child.stderr[-2000:]}")


def run(stack: Stack, options: Options) -> list[Entry]:
    workload = (
        f"{1 + WARM_CALLS} successive single points (energy, forces, stress) with {CALCULATOR} on "
        "distinct 64-atom Cu cells (4x4x1 fcc cubic, a=3.61 A, rattled 0.02 A), submitted "
        "one after the other to a worker of its own (`atomq worker --calculators "
        f"{CALCULATOR} --concurrency 1`, one thread): seconds from submit to result of the "
        f"calls after the first, which find the model loaded ({WARM_CALLS}, the median: one "
        "call moves by up to 20 % on this machine). Reference: the pure compute of one such "
        "single point, median over later calls in a fresh process that loaded the model "
        "the same way, one thread."
    )
    if find_spec("sevenn") is None or find_spec("torch") is None:
        return [not_available("warm model", stack.config, LABEL, workload, "sevenn not installed")]
    with stack.client() as client:
        try:
            record = client.calculator(CALCULATOR)
        except NotFound:
            why = f"{CALCULATOR} is not registered (no worker with sevenn has started)"
            return [not_available("warm model", stack.config, LABEL, workload, why)]
        worker = stack.start_worker([CALCULATOR], 1)
        try:
            stack.wait_for_worker(CALCULATOR, timeout_s=300)
            walls, runs, computes = [], [], []
            for seed in range(1, 2 + WARM_CALLS):
                start = time.perf_counter()
                job = client.submit(cu64(seed), SinglePoint(), calculator=CALCULATOR)
                job.result(timeout=300)
                walls.append(time.perf_counter() - start)
                info = job.info()
                assert info.started_at is not None and info.finished_at is not None
                runs.append((info.finished_at - info.started_at).total_seconds())
                computes.append(job.provenance().compute_s or 0.0)
        finally:
            stop_process(worker)  # its model takes memory the other benchmarks need
            stack.worker_processes.remove(worker)
    reference = pure_compute(
        stack, record.backend, dict(record.parameters), 3 if options.quick else 5
    )
    compute_s = statistics.median(reference["calls_s"])
    warm_s = statistics.median(walls[1:])
    ratio = warm_s / compute_s
    return [
        Entry(
            "warm model",
            stack.config,
            LABEL,
            workload,
            measured=warm_s,
            reference=compute_s,
            unit="s",
            ratio=ratio,
            budget=f"<= {BUDGET:g} x compute",
            met=ratio <= BUDGET,
            samples={"reference_calls_s": reference["calls_s"], "warm_calls_s": walls[1:]},
            derived={
                "first_call_s (model loaded in the worker)": walls[0],
                "second_call_s": walls[1],
                "warm_calls_median_s": warm_s,
                "worker_run_s (claim to result, each call)": runs,
                # The same call's own compute, timed in the worker: what the service adds
                # to a warm call, free of the noise between two processes' runs.
                "worker_compute_s (each call)": computes,
                "warm_calls_over_their_own_compute (median)": statistics.median(
                    wall / compute for wall, compute in zip(walls[1:], computes[1:], strict=True)
                ),
                "reference_load_s": reference["load_s"],
                "reference_first_call_s": reference["first_call_s"],
                "reference_median_call_s": compute_s,
            },
        )
    ]
