"""relax: ASE's optimizers, optionally with the cell through FrechetCellFilter."""

from __future__ import annotations

from typing import Any

import numpy as np
from ase import Atoms
from ase.filters import FrechetCellFilter

from atomq.results import RelaxResult, RelaxStep
from atomq.structure import Structure
from atomq.tasks import Relax
from atomq_workers.runners import Reporter
from atomq_workers.runners.common import OPTIMIZERS, read_properties


def run_relax(atoms: Atoms, task: Relax, report: Reporter) -> RelaxResult:
    target: Any = atoms
    if task.cell is not None:
        target = FrechetCellFilter(
            atoms,
            scalar_pressure=task.cell.scalar_pressure,
            hydrostatic_strain=task.cell.hydrostatic_strain,
            constant_volume=task.cell.constant_volume,
        )
    optimizer = OPTIMIZERS[task.optimizer](target, logfile=None)
    trace: list[RelaxStep] = []

    def observe() -> None:
        # Called by ASE after step 0 and after every step; forces are already computed.
        energy = float(atoms.get_potential_energy())
        fmax = float(np.sqrt((target.get_forces() ** 2).sum(axis=1)).max())
        trace.append(RelaxStep(step=optimizer.nsteps, energy=energy, fmax=fmax))
        report(optimizer.nsteps, task.max_steps, energy=energy, fmax=fmax)

    optimizer.attach(observe, interval=1)
    converged = bool(optimizer.run(fmax=task.fmax, steps=task.max_steps))
    energy, forces, stress = read_properties(atoms)
    return RelaxResult(
        energy=energy,
        forces=forces,
        stress=stress,
        structure=Structure.from_atoms(atoms),
        converged=converged,
        steps=optimizer.nsteps,
        trace=trace,
    )
