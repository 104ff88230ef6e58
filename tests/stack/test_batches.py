"""A batch through real workers: a few jobs per broker message, every result in order."""

from __future__ import annotations

from pathlib import Path

import ase.io
import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.optimize import BFGS

from atomq import Relax, SinglePoint
from atomq_service.batches import shrinking_sizes
from tests.stack.conftest import Stack
from tests.stack.test_cli import atomq
from tests.stack.test_registry_and_workers import eventually

pytestmark = pytest.mark.stack


def rattled_cells(count: int) -> list:  # type: ignore[type-arg]
    cells = []
    for index in range(count):
        atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat(2)  # 32 atoms
        atoms.rattle(0.05, seed=index)
        cells.append(atoms)
    return cells


def test_batch_results_equal_ase_in_submission_order(redis_stack: Stack) -> None:
    client = redis_stack.client()
    eventually(client.workers, what="the worker")  # message size follows live workers
    cells = rattled_cells(40)
    batch = client.submit_batch(cells, SinglePoint(), calculator="emt", tags=["batch-check"])
    info = batch.wait(120)
    assert info.counts == {"succeeded": 40}
    for atoms, ours in zip(cells, batch.atoms(), strict=True):
        # Reference: ASE's EMT on the same cell, in this process.
        atoms.calc = EMT()
        assert ours.get_potential_energy() == atoms.get_potential_energy()
        np.testing.assert_array_equal(ours.get_forces(), atoms.get_forces())
        np.testing.assert_array_equal(ours.positions, atoms.positions)
    # One worker process with one child: messages of 5, 5, 4, ... jobs, shrinking to one
    # job each at the end (a one-job message goes as run_job).
    sizes = shrinking_sizes(40, 1)
    log = (redis_stack.log_dir / "worker-1.log").read_text()
    received = [line for line in log.splitlines() if "received" in line]
    assert sum("Task atomq.run_jobs[" in line for line in received) == sum(s > 1 for s in sizes)
    assert sum("Task atomq.run_job[" in line for line in received) == sizes.count(1)
    assert len({redis_stack.worker_of(job.id) for job in batch.jobs()}) == 1


def test_relax_batch_and_cancel(redis_stack: Stack) -> None:
    client = redis_stack.client()
    strained = []
    for index, a in enumerate((3.45, 3.52, 3.60)):
        atoms = bulk("Ni", "fcc", a=a, cubic=True).repeat(2)
        atoms.rattle(0.08, seed=index)
        strained.append(atoms)
    batch = client.submit_batch(strained, Relax(fmax=0.01), calculator="emt")
    for atoms, ours in zip(strained, batch.atoms(120), strict=True):
        # Reference: ASE's BFGS with EMT in this process (BLAS single-threaded, as in the
        # workers), the same optimizer and threshold as Relax's defaults.
        atoms.calc = EMT()
        BFGS(atoms, logfile=None).run(fmax=0.01, steps=500)
        np.testing.assert_array_equal(ours.positions, atoms.positions)
        assert ours.get_potential_energy() == atoms.get_potential_energy()

    many = client.submit_batch(rattled_cells(30), SinglePoint(), calculator="emt", reuse=False)
    stopped = many.cancel()
    assert sum(stopped.counts.values()) == 30
    final = many.wait(60)
    assert final.finished and final.counts.get("cancelled", 0) >= 1


def test_cli_submits_a_file_as_one_batch(redis_stack: Stack, tmp_path: Path) -> None:
    cells = rattled_cells(6)
    path = tmp_path / "cells.extxyz"
    ase.io.write(path, cells)
    submitted = atomq(redis_stack, "submit", str(path), "--calculator", "emt", "--batch", "--wait")
    assert submitted.returncode == 0, submitted.stderr
    lines = submitted.stdout.splitlines()
    assert lines[0].startswith("batch ") and lines[-1].endswith("finished: 6 succeeded")
    job_ids = [int(line) for line in lines[1:-1]]
    assert len(job_ids) == 6
    client = redis_stack.client()
    # Reference: ASE's EMT on the cells as the file holds them (extended XYZ rounds
    # positions to 8 decimals), in this process; order kept.
    for job_id, atoms in zip(job_ids, ase.io.read(path, index=":"), strict=True):
        atoms.calc = EMT()
        assert client.job(job_id).result().energy == atoms.get_potential_energy()
