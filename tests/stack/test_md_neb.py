"""MD and NEB jobs through the real stack (uvicorn + Celery worker + Redis), checked
against ASE run directly in this process and against textbook physics."""

from __future__ import annotations

import csv
import io
import os
import signal
import time

import numpy as np
import pytest
from ase import Atoms
from ase.build import add_adsorbate, bulk, fcc100
from ase.calculators.emt import EMT
from ase.constraints import FixAtoms
from ase.md.langevin import Langevin
from ase.md.velocitydistribution import MaxwellBoltzmannDistribution, Stationary
from ase.mep import NEB as AseNEB
from ase.mep import NEBTools
from ase.optimize import BFGS, FIRE
from ase.units import fs
from threadpoolctl import threadpool_limits

from atomq import MD, NEB, JobState, Relax
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack


def copper_108() -> Atoms:
    return bulk("Cu", "fcc", a=3.61, cubic=True).repeat((3, 3, 3))


def test_nve_conserves_energy_and_obeys_equipartition(redis_stack: Stack) -> None:
    task = MD(ensemble="nve", temperature_K=300, timestep_fs=2.0, steps=1000, seed=42,
              thermo_interval=5, frame_interval=50, analysis_window=(0.5, 1.0))  # fmt: skip
    with redis_stack.client() as client:
        result = client.submit(copper_108(), task, calculator="emt").result(timeout=300)
    assert result.kind == "md" and result.steps == 1000 and result.seed == 42
    analysis = result.analysis
    # Common practice for a second-order symplectic integrator (no source): over 2 ps at
    # 2 fs the total energy drifts by less than 0.05 meV/atom/ps and never strays by more
    # than 0.5 meV/atom.
    assert analysis.energy_drift_meV_per_atom_per_ps is not None
    assert abs(analysis.energy_drift_meV_per_atom_per_ps) < 0.05
    assert analysis.energy_max_deviation_meV_per_atom is not None
    assert analysis.energy_max_deviation_meV_per_atom < 0.5
    # The reported drift is the slope of the returned thermo rows (recomputed here).
    times = np.array([r.time_fs for r in result.thermo]) / 1000
    totals = np.array([r.total_energy for r in result.thermo]) / 108
    slope = np.polyfit(times, totals, 1)[0] * 1000
    assert analysis.energy_drift_meV_per_atom_per_ps == pytest.approx(slope, rel=1e-9, abs=1e-12)
    # Equipartition for a harmonic solid (any statistical mechanics textbook): started
    # from the perfect crystal with kinetic energy only, the energy shares equally between
    # kinetic and potential, so the temperature settles at half its initial value.
    initial_temperature = result.thermo[0].temperature_K
    assert analysis.temperature_mean_K == pytest.approx(initial_temperature / 2, rel=0.05)


def langevin_reference(atoms: Atoms, seed: int, steps: int) -> Atoms:
    """The recipe the worker documents: one default_rng(seed) for the Maxwell-Boltzmann
    velocities and then the thermostat."""
    atoms = atoms.copy()
    atoms.calc = EMT()
    rng = np.random.default_rng(seed)
    MaxwellBoltzmannDistribution(atoms, temperature_K=500, rng=rng)
    Stationary(atoms)
    dynamics = Langevin(atoms, timestep=2 * fs, temperature_K=500, friction=0.02 / fs, rng=rng)
    dynamics.run(steps)
    return atoms


def test_langevin_md_equals_ase_with_the_same_seed(redis_stack: Stack) -> None:
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
    task = MD(ensemble="nvt", thermostat="langevin", temperature_K=500, timestep_fs=2.0,
              steps=200, friction_per_fs=0.02, seed=2026, frame_interval=20)  # fmt: skip
    with redis_stack.client() as client:
        job = client.submit(atoms, task, calculator="emt")
        computed = job.atoms(timeout=300)
        frames = job.trajectory()
        lazily = list(job.trajectory(lazy=True))
        provenance = job.provenance()
    reference = langevin_reference(atoms, 2026, 200)
    # ASE run directly with the same seed: the same trajectory, bit for bit.
    assert np.array_equal(computed.positions, reference.positions)
    assert np.array_equal(computed.get_momenta(), reference.get_momenta())
    assert computed.get_potential_energy() == reference.get_potential_energy()
    assert provenance.seed == 2026
    # Frames every 20 steps, both ends included, with energies and forces on each.
    assert len(frames) == len(lazily) == 11
    assert frames[-1].get_potential_energy() == pytest.approx(reference.get_potential_energy())
    assert np.allclose(frames[-1].positions, reference.positions, atol=1e-7)  # extxyz text
    assert {a.name for a in provenance.artifacts} == {"trajectory.extxyz", "thermo.csv"}


def au_on_al100() -> tuple[Atoms, Atoms]:
    """ASE's NEB tutorial system: an Au adatom hopping between hollow sites on Al(001),
    a 2x2x3 slab with the bottom two layers fixed; endpoints relaxed with BFGS here."""
    slab = fcc100("Al", size=(2, 2, 3))
    add_adsorbate(slab, "Au", 1.7, "hollow")
    slab.center(axis=2, vacuum=4.0)
    slab.set_constraint(FixAtoms(mask=[atom.tag > 1 for atom in slab]))
    initial = slab.copy()
    final = slab.copy()
    final[-1].x += final.get_cell()[0, 0] / 2
    return initial, final


def relax_directly(atoms: Atoms) -> Atoms:
    atoms = atoms.copy()
    atoms.calc = EMT()
    with threadpool_limits(limits=1):
        BFGS(atoms, logfile=None).run(fmax=0.02, steps=200)
    return atoms


def neb_directly(initial: Atoms, final: Atoms) -> tuple[list[float], float]:
    images = [initial.copy() for _ in range(4)] + [final.copy()]
    for image in images:
        image.calc = EMT()
    band = AseNEB(images, k=0.1, climb=False, method="improvedtangent")
    band.interpolate(method="linear")
    with threadpool_limits(limits=1):
        FIRE(band, logfile=None).run(fmax=0.03, steps=500)
    energies = [float(image.get_potential_energy()) for image in images]
    barrier, _ = NEBTools(images).get_barrier(fit=False)
    return energies, float(barrier)


def test_neb_au_adatom_on_al100_equals_ase(redis_stack: Stack) -> None:
    start, end = au_on_al100()
    task_options = {"images": 3, "interpolation": "linear", "optimizer": "FIRE", "fmax": 0.03}
    with redis_stack.client() as client:
        # Endpoints relaxed through the service, then referenced by the NEB job.
        relax_a = client.submit(start, Relax(fmax=0.02), calculator="emt")
        relax_b = client.submit(end, Relax(fmax=0.02), calculator="emt")
        relax_a.result(timeout=120), relax_b.result(timeout=120)
        job = client.submit(
            None, NEB(initial=relax_a, final=relax_b, **task_options), calculator="emt"
        )
        result = job.result(timeout=300)
        provenance = job.provenance()
        images = job.trajectory(name="images.extxyz")
    initial, final = relax_directly(start), relax_directly(end)
    energies, barrier = neb_directly(initial, final)
    # ASE's NEB run directly on the same endpoints is the reference, bit for bit.
    assert [p.energy for p in result.profile] == energies
    assert result.forward_barrier == barrier
    # Cross-check of the setup itself: this system's barrier with ASE directly is
    # 0.374 +- 0.005 eV (ASE's tutorial text quotes about 0.35 eV for the same setup).
    assert barrier == pytest.approx(0.374, abs=0.005)
    assert result.reverse_barrier == pytest.approx(barrier - result.reaction_energy)
    assert result.converged
    assert result.highest_image == int(np.argmax(energies))
    assert [p.path_coordinate for p in result.profile] == sorted(
        p.path_coordinate for p in result.profile
    )
    assert provenance.parents == [relax_a.id, relax_b.id]
    assert len(images) == 5


def slow_md(steps: int = 20_000) -> MD:
    return MD(ensemble="nve", temperature_K=300, timestep_fs=1.0, steps=steps, seed=1,
              frame_interval=10, thermo_interval=10)  # fmt: skip


def wait_for_step(job, step: int, timeout: float = 120) -> None:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + timeout
    while (info := job.info()).progress is None or info.progress.step < step:
        assert not info.state.finished, info.error
        assert time.monotonic() < deadline, "the job made no progress"
        time.sleep(0.05)


def test_cancel_keeps_the_frames_so_far(redis_stack: Stack) -> None:
    with redis_stack.client() as client:
        job = client.submit(copper_108(), slow_md(), calculator="emt")
        wait_for_step(job, 100)
        job.cancel()
        info = job.wait(timeout=60)
        frames = job.trajectory()
        thermo = job.artifacts()
    assert info.state is JobState.cancelled
    assert info.progress is not None
    stopped_at = info.progress.step
    assert info.error == f"cancelled at step {stopped_at}"
    # Every frame up to the step reached (one every 10 steps, step 0 included).
    assert len(frames) == stopped_at // 10 + 1
    assert {a.name for a in thermo} == {"trajectory.extxyz", "thermo.csv"}


def test_time_limit_fails_the_job_and_keeps_its_frames(redis_stack: Stack) -> None:
    with redis_stack.client() as client:
        job = client.submit(copper_108(), slow_md(), calculator="emt", time_limit_s=2.0)
        info = job.wait(timeout=120)
        frames = job.trajectory()
    assert info.state is JobState.failed
    assert info.error is not None and info.error.startswith("time_limit:")
    assert 0 < len(frames) < 20_000 // 10 + 1
    assert info.time_limit_s == 2.0


def test_killed_worker_is_followed_by_one_complete_rerun(redis_stack: Stack) -> None:
    steps = 3000
    with redis_stack.client() as client:
        job = client.submit(copper_108(), slow_md(steps), calculator="emt")
        wait_for_step(job, 200)
        running = job.info()
        assert running.attempts == 1
        # The row names the prefork child that runs it: kill it as a crash would.
        pid = int(redis_stack.worker_of(job.id).rsplit(":", 1)[1])
        os.kill(pid, signal.SIGKILL)
        info = job.wait(timeout=300)
        assert info.state is JobState.succeeded, info.error
        frames = job.trajectory()
        thermo_text = io.StringIO()
        path = job.download("thermo.csv", redis_stack.log_dir / "thermo.csv")
        thermo_text.write(path.read_text())
        provenance = job.provenance()
    assert info.attempts == 2
    assert provenance.attempt == 2
    # One complete trajectory: every 10th step from 0 to the end, once each, in order.
    assert len(frames) == steps // 10 + 1
    rows = list(csv.DictReader(io.StringIO(thermo_text.getvalue())))
    assert [int(r["step"]) for r in rows] == list(range(0, steps + 1, 10))
    # The rerun starts from the same seed, so it reproduces the same run.
    reference = copper_108()
    reference.calc = EMT()
    assert frames[0].get_potential_energy() == pytest.approx(
        reference.get_potential_energy(), abs=1e-9
    )


def test_progress_streams_as_server_sent_events(redis_stack: Stack) -> None:
    with redis_stack.client() as client:
        job = client.submit(copper_108(), slow_md(400), calculator="emt")
        seen = list(job.follow())
    states = [s.state for s in seen]
    assert states[-1] is JobState.succeeded
    steps = [s.progress.step for s in seen if s.progress is not None]
    assert steps == sorted(steps) and steps[-1] == 400
    assert any(s.progress and s.progress.temperature_K for s in seen)
