"""(7) Cost growth: how the service's share of a single point grows with the structure."""

from __future__ import annotations

import itertools
import time
from typing import Any

from atomq import SinglePoint
from suite.harness import Entry, Options, Stack, loglog_slope
from suite.workloads import cu_supercell, timed_emt_single_point

BUDGET_EXPONENT = 1.0
FIT_FROM = 1_000  # below this the share is the fixed cost of a job, not growth


def sizes(options: Options) -> list[int]:
    return [100, 1_000] if options.quick else [100, 1_000, 10_000, 100_000]


def run(stack: Stack, options: Options) -> list[Entry]:
    points: list[dict[str, Any]] = []
    with stack.client() as client:
        stack.warm_up(client)
        for n in sizes(options):
            atoms = cu_supercell(n, seed=5)
            before_s, _ = timed_emt_single_point(atoms)
            start = time.perf_counter()
            job = client.submit(atoms, SinglePoint(), calculator="emt")
            job.atoms(timeout=600)
            wall_s = time.perf_counter() - start
            after_s, _ = timed_emt_single_point(atoms)
            compute_s = min(before_s, after_s)  # other people's load only ever adds time
            info, provenance = job.info(), job.provenance()
            assert info.started_at is not None and info.finished_at is not None
            assert provenance.compute_s is not None
            points.append(
                {
                    "natoms": n,
                    "service_s": wall_s,
                    "compute_s": compute_s,
                    "compute_s (before, after)": [before_s, after_s],
                    "worker_compute_s": provenance.compute_s,
                    # Everything but the calculation, in the same run: the wall time less
                    # the worker's own timing of the task (a difference with a separate
                    # in-process run would carry that run's noise, seconds at 100 000
                    # atoms, into the share).
                    "service_share_s": wall_s - provenance.compute_s,
                    "share_against_in_process_s": wall_s - compute_s,
                    "worker_run_s": (info.finished_at - info.started_at).total_seconds(),
                }
            )
    fitted = [p for p in points if p["natoms"] >= FIT_FROM]
    if len(fitted) < 2:
        fitted = points
    exponent = loglog_slope(
        [p["natoms"] for p in fitted], [max(p["service_share_s"], 1e-6) for p in fitted]
    )
    steps = [
        {
            "from": a["natoms"],
            "to": b["natoms"],
            "exponent": loglog_slope(
                [a["natoms"], b["natoms"]],
                [max(a["service_share_s"], 1e-6), max(b["service_share_s"], 1e-6)],
            ),
        }
        for a, b in itertools.pairwise(points)
    ]
    largest = points[-1]
    listed = ", ".join(f"{n:,}".replace(",", " ") for n in sizes(options))
    return [
        Entry(
            "cost growth",
            stack.config,
            f"EMT SP, {listed} atoms",
            f"One EMT single point each on Cu fcc supercells of {listed} atoms (primitive "
            "cell repeated, a=3.61 A, rattled 0.02 A): seconds from client.submit to "
            "job.atoms() through the service, and the same calculation in this process (one "
            "BLAS thread, once just before and once just after; the faster). The service's "
            "share is the wall time less the calculation's own time as the worker measured "
            "it in the same run (provenance compute_s); its growth exponent is the "
            "least-squares slope of "
            f"log(share) against log(atoms) over the sizes from {FIT_FROM} atoms up. "
            "Measured: the largest structure's share; reference: its compute.",
            measured=largest["service_share_s"],
            reference=largest["compute_s"],
            unit="s",
            ratio=largest["service_share_s"] / largest["compute_s"],
            shown=(
                f"exponent {exponent:.2f}; share {largest['service_share_s']:.2f} s",
                f"compute {largest['compute_s']:.2f} s",
            ),
            budget=f"share exponent <= {BUDGET_EXPONENT:g}",
            met=exponent <= BUDGET_EXPONENT,
            derived={
                "growth_exponent": exponent,
                "exponent_between_sizes": steps,
                "points": points,
            },
        )
    ]
