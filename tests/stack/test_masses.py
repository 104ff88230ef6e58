"""Custom masses reach the worker: heavy water (D2O) MD through the real stack equals
ASE run directly in this process with the same masses and seed, bit for bit (final
structure, energies along the run, trajectory frames)."""

from __future__ import annotations

import io
from dataclasses import dataclass, field

import ase.io
import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.calculators.emt import EMT
from ase.calculators.singlepoint import SinglePointCalculator
from ase.md.langevin import Langevin
from ase.md.velocitydistribution import MaxwellBoltzmannDistribution, Stationary
from ase.units import fs

from atomq import MD
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack

# Atomic mass of deuterium, 2.01410178 u (NIST/IUPAC atomic masses; recalled from memory),
# against ASE's standard atomic weight of hydrogen, 1.008.
DEUTERIUM_U = 2.01410178
STEPS, SEED, THERMO_EVERY, FRAME_EVERY = 60, 7, 5, 20


def heavy_water() -> Atoms:
    atoms = molecule("H2O")
    atoms.center(vacuum=4.0)
    masses = atoms.get_masses()
    masses[atoms.numbers == 1] = DEUTERIUM_U
    atoms.set_masses(masses)
    return atoms


@dataclass
class DirectRun:
    atoms: Atoms
    energies: list[tuple[int, float, float]] = field(default_factory=list)  # step, Epot, Ekin
    frames: list[Atoms] = field(default_factory=list)


def langevin_directly(atoms: Atoms) -> DirectRun:
    """The worker's documented recipe: one default_rng(seed) for the Maxwell-Boltzmann
    velocities, then the thermostat's noise; energies and frames recorded by ASE's
    observer at step 0 and after every step, frames written as extended XYZ by ASE."""
    run = DirectRun(atoms.copy())
    atoms = run.atoms
    atoms.calc = EMT()
    rng = np.random.default_rng(SEED)
    MaxwellBoltzmannDistribution(atoms, temperature_K=300, rng=rng)
    Stationary(atoms)
    dynamics = Langevin(atoms, timestep=0.5 * fs, temperature_K=300, friction=0.02 / fs, rng=rng)

    def observe() -> None:
        step = dynamics.nsteps
        if step % THERMO_EVERY == 0:
            energy = atoms.get_potential_energy()
            run.energies.append((step, energy, atoms.get_kinetic_energy()))
        if step % FRAME_EVERY == 0:
            frame = atoms.copy()
            frame.calc = SinglePointCalculator(
                frame, energy=atoms.get_potential_energy(), forces=atoms.get_forces()
            )
            text = io.StringIO()
            ase.io.write(text, frame, format="extxyz")
            text.seek(0)
            run.frames.append(ase.io.read(text, format="extxyz"))

    dynamics.attach(observe, interval=1)
    dynamics.run(STEPS)
    return run


def test_heavy_water_md_uses_its_masses(redis_stack: Stack) -> None:
    atoms = heavy_water()
    task = MD(ensemble="nvt", thermostat="langevin", temperature_K=300, timestep_fs=0.5,
              steps=STEPS, friction_per_fs=0.02, seed=SEED, thermo_interval=THERMO_EVERY,
              frame_interval=FRAME_EVERY)  # fmt: skip
    with redis_stack.client() as client:
        job = client.submit(atoms, task, calculator="emt")
        result = job.result(timeout=300)
        computed = job.atoms()
        frames = job.trajectory()
    reference = langevin_directly(atoms)
    final = reference.atoms

    # The final structure: masses back as sent, positions and momenta as ASE's run.
    assert computed.get_masses().tobytes() == atoms.get_masses().tobytes()
    assert result.structure.masses == atoms.get_masses().tolist()
    assert np.array_equal(computed.positions, final.positions)
    assert np.array_equal(computed.get_momenta(), final.get_momenta())
    assert computed.get_potential_energy() == final.get_potential_energy()

    # Energies along the run, every THERMO_EVERY steps from step 0.
    got = [(r.step, r.potential_energy, r.kinetic_energy) for r in result.thermo]
    assert got == reference.energies
    assert [r.total_energy for r in result.thermo] == [e + k for _, e, k in reference.energies]

    # Frames: the same extended-XYZ text as ASE writes for the direct run, masses included.
    assert len(frames) == len(reference.frames) == STEPS // FRAME_EVERY + 1
    for frame, expected in zip(frames, reference.frames, strict=True):
        assert frame.positions.tobytes() == expected.positions.tobytes()
        assert frame.get_momenta().tobytes() == expected.get_momenta().tobytes()
        assert frame.get_masses().tolist() == atoms.get_masses().tolist()
        assert frame.get_potential_energy() == expected.get_potential_energy()
        assert frame.get_forces().tobytes() == expected.get_forces().tobytes()

    # The check can fail: with ASE's default hydrogen mass the run goes elsewhere.
    light = atoms.copy()
    light.set_masses()  # back to the standard atomic weights
    light_run = langevin_directly(light)
    assert not np.array_equal(light_run.atoms.positions, computed.positions)
    assert [e for _, e, _ in light_run.energies] != [r.potential_energy for r in result.thermo]
