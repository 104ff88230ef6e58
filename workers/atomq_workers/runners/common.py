"""Reading results off an ASE calculator into the wire form."""

from __future__ import annotations

import numpy as np
from ase import Atoms
from ase.optimize import BFGS, FIRE, LBFGS, MDMin
from ase.optimize.optimize import Optimizer

from atomq.results import Voigt6
from atomq.structure import Vec3

OPTIMIZERS: dict[str, type[Optimizer]] = {
    "BFGS": BFGS,
    "LBFGS": LBFGS,
    "FIRE": FIRE,
    "MDMin": MDMin,
}


def has_stress(atoms: Atoms) -> bool:
    """Stress is defined for structures periodic in all three directions."""
    return bool(atoms.pbc.all()) and "stress" in atoms.calc.implemented_properties


def read_properties(atoms: Atoms) -> tuple[float, list[Vec3], Voigt6 | None]:
    energy = float(atoms.get_potential_energy())
    forces: list[Vec3] = np.asarray(atoms.get_forces(), dtype=float).tolist()  # Python floats
    stress: Voigt6 | None = None
    if has_stress(atoms):
        s = [float(x) for x in atoms.get_stress(voigt=True)]
        stress = (s[0], s[1], s[2], s[3], s[4], s[5])
    return energy, forces, stress
