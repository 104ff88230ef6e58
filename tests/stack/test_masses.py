"""Custom masses reach the worker: heavy water (D2O) MD through the real stack equals
ASE run directly in this process with the same masses and seed, bit for bit."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.calculators.emt import EMT
from ase.md.langevin import Langevin
from ase.md.velocitydistribution import MaxwellBoltzmannDistribution, Stationary
from ase.units import fs

from atomq import MD
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack

# Atomic mass of deuterium, 2.01410178 u (NIST/IUPAC atomic masses; recalled from memory),
# against ASE's standard atomic weight of hydrogen, 1.008.
DEUTERIUM_U = 2.01410178
STEPS, SEED = 60, 7


def heavy_water() -> Atoms:
    atoms = molecule("H2O")
    atoms.center(vacuum=4.0)
    masses = atoms.get_masses()
    masses[atoms.numbers == 1] = DEUTERIUM_U
    atoms.set_masses(masses)
    return atoms


def langevin_directly(atoms: Atoms) -> Atoms:
    """The worker's documented recipe: one default_rng(seed) for the Maxwell-Boltzmann
    velocities, then the thermostat's noise."""
    atoms = atoms.copy()
    atoms.calc = EMT()
    rng = np.random.default_rng(SEED)
    MaxwellBoltzmannDistribution(atoms, temperature_K=300, rng=rng)
    Stationary(atoms)
    Langevin(atoms, timestep=0.5 * fs, temperature_K=300, friction=0.02 / fs, rng=rng).run(STEPS)
    return atoms


def test_heavy_water_md_uses_its_masses(redis_stack: Stack) -> None:
    atoms = heavy_water()
    task = MD(ensemble="nvt", thermostat="langevin", temperature_K=300, timestep_fs=0.5,
              steps=STEPS, friction_per_fs=0.02, seed=SEED, frame_interval=20)  # fmt: skip
    with redis_stack.client() as client:
        computed = client.submit(atoms, task, calculator="emt").atoms(timeout=300)
    reference = langevin_directly(atoms)
    assert computed.get_masses().tobytes() == atoms.get_masses().tobytes()
    assert np.array_equal(computed.positions, reference.positions)
    assert np.array_equal(computed.get_momenta(), reference.get_momenta())
    assert computed.get_potential_energy() == reference.get_potential_energy()
    # The check can fail: with ASE's default hydrogen mass the run goes elsewhere.
    light = atoms.copy()
    light.set_masses()  # back to the standard atomic weights
    assert not np.array_equal(langevin_directly(light).positions, computed.positions)
