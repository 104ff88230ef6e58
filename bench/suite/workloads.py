"""The structures the benchmarks compute on, and the in-process references (ASE alone)."""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from ase import Atoms
from ase.build import bulk
from ase.calculators.emt import EMT
from threadpoolctl import threadpool_limits

CU_A = 3.61  # Angstrom, the fcc lattice constant of copper (room temperature, handbook value)


def rattled_cu32(seed: int, stdev: float = 0.05) -> Atoms:
    """32-atom Cu fcc cell (2x2x2 conventional cubic), each atom displaced at random
    (Gaussian, `stdev` Angstrom): a distinct structure per seed."""
    atoms: Atoms = bulk("Cu", "fcc", a=CU_A, cubic=True).repeat((2, 2, 2))
    atoms.rattle(stdev, seed=seed)
    return atoms


def dimer(index: int) -> Atoms:
    """Two Cu atoms 2.5 Angstrom apart (plus index * 1e-5, so every job is distinct and
    none is answered from an earlier identical one), no cell."""
    return Atoms("Cu2", positions=[(0, 0, 0), (0, 0, 2.5 + index * 1e-5)])


# Repeats of the one-atom fcc primitive cell giving exactly these atom counts, as
# compact as integer factors allow.
PRIMITIVE_REPEATS = {
    100: (5, 5, 4),
    1_000: (10, 10, 10),
    10_000: (25, 20, 20),
    20_000: (25, 20, 40),
    100_000: (50, 50, 40),
}


def cu_supercell(natoms: int, seed: int = 1) -> Atoms:
    """Cu fcc supercell of exactly `natoms` atoms, rattled by 0.02 Angstrom."""
    atoms: Atoms = bulk("Cu", "fcc", a=CU_A).repeat(PRIMITIVE_REPEATS[natoms])
    atoms.rattle(0.02, seed=seed)
    return atoms


def emt_single_point(atoms: Atoms) -> tuple[float, Any, Any]:
    """What a worker's single point computes: energy, forces, and stress (periodic)."""
    atoms = atoms.copy()
    atoms.calc = EMT()
    energy = float(atoms.get_potential_energy())
    forces = atoms.get_forces()
    stress = atoms.get_stress() if atoms.pbc.all() else None
    return energy, forces, stress


def timed_emt_single_point(atoms: Atoms) -> tuple[float, float]:
    """(seconds, energy) of one EMT single point in this process, one BLAS thread."""
    with threadpool_limits(limits=1):
        start = time.perf_counter()
        energy, _, _ = emt_single_point(atoms)
        return time.perf_counter() - start, energy


_limits: Any = None


def single_thread() -> None:
    """Pool initializer: one BLAS/OpenMP thread, as in the workers."""
    global _limits
    _limits = threadpool_limits(limits=1)


def energies_agree(a: list[float], b: list[float]) -> dict[str, Any]:
    """How closely two lists of energies agree (the README promises bit for bit)."""
    diff = np.abs(np.asarray(a) - np.asarray(b))
    return {"identical": bool((diff == 0).all()), "max_abs_diff_eV": float(diff.max())}
