"""single_point: energy, forces, and stress when periodic."""

from __future__ import annotations

from ase import Atoms

from atomq.results import SinglePointResult
from atomq.structure import Structure
from atomq.tasks import SinglePoint
from atomq_workers.runners import Reporter
from atomq_workers.runners.common import read_properties


def run_single_point(atoms: Atoms, _task: SinglePoint, report: Reporter) -> SinglePointResult:
    report(0, 1)
    energy, forces, stress = read_properties(atoms)
    report(1, 1, energy=energy)
    return SinglePointResult(
        energy=energy, forces=forces, stress=stress, structure=Structure.from_atoms(atoms)
    )
