"""The model-swap report's acceptance test: CHGNet 0.2.0 replaced by 0.3.0 over a small
tagged set of Cu-Ni-Al cells, rerun through the real stack (uvicorn, a Celery worker,
Redis), each row checked against CHGNet run directly in this process with chgnet's own
loader and calculator, both checkpoints.

Tolerances: CHGNet computes in float32, about 7 significant digits, so an energy of
-4 eV/atom is resolved to about 5e-7 eV/atom. The worker and this process run the same
weights through the same code, but torch may sum in another order (thread count, graph
batching), which moves the last float32 digits: 1e-6 eV/atom for energies and 1e-5 eV/A
for forces allow that and nothing more. The deltas themselves are millielectronvolts.
"""

from __future__ import annotations

import importlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk
from sqlmodel import select

from atomq import JobState, SinglePoint
from atomq_service.db import transaction
from atomq_service.models import Calculator
from atomq_service.registry import register
from atomq_workers.backends_ml import shipped_checkpoints
from tests.model_swap import assert_summary_matches_rows
from tests.stack.conftest import Stack, start_stack

pytestmark = pytest.mark.stack

TAG = "brackenfield-chgnet"
VERSIONS = ("0.2.0", "0.3.0")


def cells() -> list[Atoms]:
    """Four small cells of the Brackenfield group's Cu-Ni-Al system, slightly rattled so
    that forces are not zero by symmetry."""
    cu = bulk("Cu", "fcc", a=3.615, cubic=True)  # Kittel's a for Cu (recalled from memory)
    # Ni3Al in the L1_2 structure, a = 3.57 Angstrom (recalled from memory).
    ni3al = Atoms(
        "AlNi3",
        scaled_positions=[(0, 0, 0), (0, 0.5, 0.5), (0.5, 0, 0.5), (0.5, 0.5, 0)],
        cell=[3.57] * 3,
        pbc=True,
    )
    cuni = bulk("Cu", "fcc", a=3.58, cubic=True)
    cuni.set_chemical_symbols(["Cu", "Ni", "Cu", "Ni"])
    mixed = bulk("Cu", "fcc", a=3.64, cubic=True).repeat((2, 1, 1))
    mixed.set_chemical_symbols(["Cu", "Cu", "Ni", "Al", "Cu", "Ni", "Cu", "Al"])
    made = [cu, ni3al, cuni, mixed]
    for seed, atoms in enumerate(made):
        atoms.rattle(stdev=0.03, seed=seed)
    return made


@pytest.fixture(scope="module", autouse=True)
def _one_torch_thread() -> Iterator[None]:
    torch = importlib.import_module("torch")
    before = torch.get_num_threads()
    torch.set_num_threads(1)  # as the workers run (atomq_workers.main.SINGLE_THREAD)
    yield
    torch.set_num_threads(before)


@pytest.fixture
def chgnet_stack(tmp_path: Path, redis_url: str) -> Iterator[Stack]:
    """The stack with both CHGNet versions registered before its worker starts (a worker
    chooses its queues when it starts). Records already present are left as they are."""
    pytest.importorskip("chgnet.model", reason="chgnet is not installed: pip install chgnet")
    stack = start_stack(tmp_path, f"sqlite:///{tmp_path / 'atomq.db'}", redis_url, workers=0)
    try:
        shipped = {c.ref: c for c in shipped_checkpoints()}
        with transaction(stack.engine) as session:
            present = set(session.exec(select(Calculator.name, Calculator.version)).all())
            for version in VERSIONS:
                if ("chgnet", version) not in present:
                    register(session, **shipped[f"chgnet@{version}"].record())
        stack.start_worker()
        yield stack
    finally:
        stack.stop()


def chgnet_directly(version: str, atoms: list[Atoms]) -> list[tuple[float, np.ndarray]]:
    """Energy and forces from chgnet's own loader and ASE calculator, no atomq code."""
    chgnet_model = importlib.import_module("chgnet.model")
    network = chgnet_model.CHGNet.load(model_name=version, use_device="cpu", verbose=False)
    calculator = chgnet_model.CHGNetCalculator(model=network, use_device="cpu")
    found = []
    for structure in atoms:
        copy = structure.copy()
        copy.calc = calculator
        found.append((float(copy.get_potential_energy()), copy.get_forces()))
    return found


def test_chgnet_020_to_030_report_equals_chgnet_run_directly(chgnet_stack: Stack) -> None:
    work = cells()
    with chgnet_stack.client() as client:
        jobs = [
            client.submit(atoms, SinglePoint(), calculator="chgnet@0.2.0", tags=[TAG])
            for atoms in work
        ]
        for job in jobs:
            info = job.wait(timeout=300)
            assert info.state is JobState.succeeded, info.error
        comparison = client.compare("chgnet@0.3.0", tag=TAG)
        report = comparison.wait(timeout=300)
        frame = comparison.dataframe()
        provenance = client.job(report.rows[0].candidate_job).provenance()

    assert report.complete and report.calculator == "chgnet@0.3.0"
    assert {row.state for row in report.rows} == {JobState.succeeded}
    old, new = (chgnet_directly(version, work) for version in VERSIONS)
    by_job = {row.baseline_job: row for row in report.rows}
    for job, atoms, (e_old, f_old), (e_new, f_new) in zip(jobs, work, old, new, strict=True):
        row = by_job[job.id]
        assert row.formula == atoms.get_chemical_formula()
        expected: dict[str, Any] = {
            "delta_energy_per_atom_eV": (e_new - e_old) / len(atoms),
            "max_force_delta_eV_per_A": float(np.linalg.norm(f_new - f_old, axis=1).max()),
        }
        assert row.delta_energy_per_atom_eV == pytest.approx(
            expected["delta_energy_per_atom_eV"], rel=0, abs=1e-6
        )
        assert row.max_force_delta_eV_per_A == pytest.approx(
            expected["max_force_delta_eV_per_A"], rel=0, abs=1e-5
        )
    # The two versions differ by far more than the tolerance: the check has teeth.
    assert report.summary["delta_energy_per_atom_eV"].max_abs > 1e-3
    assert_summary_matches_rows(report)
    assert len(frame) == len(work)
    # The rerun's provenance names the 0.3.0 weights by their sha256.
    shipped = {c.ref: c for c in shipped_checkpoints()}
    assert provenance.weights_sha256 == shipped["chgnet@0.3.0"].weights_sha256
    assert provenance.parents == [report.rows[0].baseline_job]
