"""Reference values the tests compute with ASE itself, shared where several need one."""

from __future__ import annotations

import numpy as np
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.eos import EquationOfState


def emt_cu_equilibrium_volume_per_atom() -> float:
    """Cu fcc equilibrium volume per atom of ASE's EMT, from a Birch-Murnaghan
    equation-of-state fit over 3.50-3.68 Angstrom, run here with ASE."""
    volumes, energies = [], []
    for a in np.linspace(3.50, 3.68, 10):
        atoms = bulk("Cu", "fcc", a=a)  # the primitive cell: one atom
        atoms.calc = EMT()
        volumes.append(atoms.get_volume())
        energies.append(atoms.get_potential_energy())
    v0, _e0, _b = EquationOfState(volumes, energies, eos="birchmurnaghan").fit()
    return float(v0)
