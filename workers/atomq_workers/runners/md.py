"""md: ASE's integrators, with thermo log, trajectory and analysis written as it runs.

Reproducible by construction: one numpy Generator, default_rng(seed), supplies first
the Maxwell-Boltzmann velocities and then the thermostat's noise.
"""

from __future__ import annotations

from typing import Any, TextIO

import ase.io
import numpy as np
from ase import Atoms, units
from ase.calculators.singlepoint import SinglePointCalculator
from ase.md.bussi import Bussi
from ase.md.langevin import Langevin
from ase.md.md import MolecularDynamics
from ase.md.nose_hoover_chain import MTKNPT, IsotropicMTKNPT, NoseHooverChainNVT
from ase.md.velocitydistribution import MaxwellBoltzmannDistribution, Stationary
from ase.md.verlet import VelocityVerlet

from atomq.results import MDResult, ThermoRow
from atomq.structure import Structure
from atomq.tasks import MD
from atomq_workers.analysis import DisplacementTracker, RadialDistributionAccumulator, analyse
from atomq_workers.artifacts import ArtifactWriter
from atomq_workers.runners import Reporter
from atomq_workers.runners.common import has_stress, read_properties

THERMO_COLUMNS = [
    "step",
    "time_fs",
    "temperature_K",
    "potential_energy",
    "kinetic_energy",
    "total_energy",
    "pressure_GPa",
    "volume",
]


def make_integrator(atoms: Atoms, task: MD, rng: np.random.Generator) -> MolecularDynamics:
    """The ASE integrator for the task, with ASE's units (time in ASE units, not fs)."""
    dt = task.timestep_fs * units.fs
    temperature = task.temperature_K
    if task.ensemble == "nve":
        return VelocityVerlet(atoms, timestep=dt)
    assert temperature is not None  # the task's own validator guarantees it
    if task.ensemble == "nvt":
        if task.thermostat == "langevin":
            return Langevin(
                atoms,
                timestep=dt,
                temperature_K=temperature,
                friction=task.friction_per_fs / units.fs,
                rng=rng,
            )
        if task.thermostat == "bussi":
            return Bussi(
                atoms,
                dt,
                temperature_K=temperature,
                taut=task.thermostat_time_fs * units.fs,
                rng=rng,
            )
        return NoseHooverChainNVT(
            atoms, dt, temperature_K=temperature, tdamp=task.thermostat_time_fs * units.fs
        )
    barostat = IsotropicMTKNPT if task.cell_flexibility == "isotropic" else MTKNPT
    return barostat(
        atoms,
        dt,
        temperature_K=temperature,
        pressure_au=task.pressure_GPa * units.GPa,
        tdamp=task.thermostat_time_fs * units.fs,
        pdamp=task.barostat_time_fs * units.fs,
    )


def prepare_velocities(atoms: Atoms, task: MD, rng: np.random.Generator) -> None:
    if task.initial_velocities == "maxwell_boltzmann":
        assert task.temperature_K is not None
        MaxwellBoltzmannDistribution(atoms, temperature_K=task.temperature_K, rng=rng)
        Stationary(atoms)  # no centre-of-mass drift


def run_md(atoms: Atoms, task: MD, report: Reporter, artifacts: ArtifactWriter) -> MDResult:
    assert task.seed is not None  # the service draws one when the user gave none
    rng = np.random.default_rng(task.seed)
    prepare_velocities(atoms, task, rng)
    dynamics = make_integrator(atoms, task, rng)
    periodic = has_stress(atoms)
    trajectory = artifacts.open("trajectory.extxyz", "chemical/x-extxyz")
    thermo_log = artifacts.open("thermo.csv", "text/csv")
    thermo_log.write(",".join(THERMO_COLUMNS) + "\n")
    thermo: list[ThermoRow] = []
    cell_parameters: list[tuple[float, np.ndarray]] = []
    displacements = DisplacementTracker(atoms)
    rdfs = [
        RadialDistributionAccumulator(atoms, pair, task.rdf_rmax, task.rdf_nbins)
        for pair in task.rdf_pairs
    ]

    def observe() -> None:
        # Called by ASE at step 0 and after every step; forces are already computed.
        step = dynamics.nsteps
        potential = float(atoms.get_potential_energy())
        temperature = float(atoms.get_temperature())
        if step % task.thermo_interval == 0 or step == task.steps:
            row = thermo_row(atoms, step, step * task.timestep_fs, potential, periodic)
            thermo.append(row)
            write_thermo(thermo_log, row)
            if periodic:
                cell_parameters.append((row.time_fs, atoms.cell.cellpar()))
        if step % task.frame_interval == 0 or step == task.steps:
            write_frame(trajectory, atoms, potential, periodic)
            time_fs = step * task.timestep_fs
            displacements.sample(atoms, time_fs)
            for rdf in rdfs:
                rdf.sample(atoms, time_fs)
        report(step, task.steps, energy=potential, temperature_K=temperature)

    dynamics.attach(observe, interval=1)
    dynamics.run(steps=task.steps)
    energy, forces, stress = read_properties(atoms)
    return MDResult(
        energy=energy,
        forces=forces,
        stress=stress,
        structure=Structure.from_atoms(atoms),
        steps=dynamics.nsteps,
        seed=task.seed,
        thermo=thermo,
        analysis=analyse(task, atoms, thermo, cell_parameters, displacements, rdfs),
    )


def thermo_row(
    atoms: Atoms, step: int, time_fs: float, potential: float, periodic: bool
) -> ThermoRow:
    kinetic = float(atoms.get_kinetic_energy())
    pressure = volume = None
    if periodic:
        stress = atoms.get_stress(include_ideal_gas=True)
        pressure = float(-stress[:3].sum() / 3 / units.GPa)
        volume = float(atoms.get_volume())
    return ThermoRow(
        step=step,
        time_fs=time_fs,
        temperature_K=float(atoms.get_temperature()),
        potential_energy=potential,
        kinetic_energy=kinetic,
        total_energy=potential + kinetic,
        pressure_GPa=pressure,
        volume=volume,
    )


def write_thermo(handle: TextIO, row: ThermoRow) -> None:
    values: list[Any] = [getattr(row, column) for column in THERMO_COLUMNS]
    handle.write(",".join("" if v is None else repr(v) for v in values) + "\n")
    handle.flush()


def write_frame(handle: TextIO, atoms: Atoms, potential: float, periodic: bool) -> None:
    """One extended-XYZ frame with positions, momenta, energy, forces (and stress)."""
    frame = atoms.copy()
    results: dict[str, Any] = {"energy": potential, "forces": atoms.get_forces()}
    if periodic:
        results["stress"] = atoms.get_stress()
    frame.calc = SinglePointCalculator(frame, **results)
    ase.io.write(handle, frame, format="extxyz")
    handle.flush()
