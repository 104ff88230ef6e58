"""What a model-swap report should say, computed with ASE run directly in this process.

No atomq code computes anything here: each function is ASE's own recipe (as ASE documents
it, and as the worker's runners describe theirs), so the service's numbers are checked
against something outside the project. BLAS runs single-threaded, as on the workers.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from ase import Atoms, units
from ase.build import add_adsorbate, fcc100
from ase.calculators.calculator import Calculator
from ase.calculators.emt import EMT
from ase.calculators.emt import parameters as emt_parameters
from ase.constraints import FixAtoms
from ase.filters import FrechetCellFilter
from ase.md.nose_hoover_chain import IsotropicMTKNPT
from ase.md.velocitydistribution import MaxwellBoltzmannDistribution, Stationary
from ase.mep import NEB
from ase.optimize import BFGS, FIRE
from threadpoolctl import threadpool_limits

from atomq.comparisons import METRICS, ComparisonPublic

# A second EMT version for the swap: the same model with ASE's `asap_cutoff` option, which
# uses the cutoff of the Asap implementation instead of ASE's own. Energies differ by
# about 1e-4 eV/atom on the alloy cells below: small, real, and exactly reproducible.
EMT_ASAP = {
    "name": "emt",
    "version": "2",
    "backend": "emt",
    "parameters": {"asap_cutoff": True},
    "elements": sorted(emt_parameters),
    "notes": "ASE's EMT with asap_cutoff=True (the Asap code's cutoff).",
}


def emt(version: str) -> Calculator:
    """A fresh ASE calculator for 'emt@1' or 'emt@2', built here without atomq."""
    return EMT(asap_cutoff=True) if version == "2" else EMT()


def single_point(atoms: Atoms, calculator: Calculator) -> tuple[float, np.ndarray]:
    atoms = atoms.copy()
    atoms.calc = calculator
    with threadpool_limits(limits=1):
        return float(atoms.get_potential_energy()), atoms.get_forces()


def relax_cell(atoms: Atoms, calculator: Calculator, fmax: float, steps: int = 500) -> Atoms:
    """BFGS on positions and cell through FrechetCellFilter, ASE's recipe."""
    atoms = atoms.copy()
    atoms.calc = calculator
    with threadpool_limits(limits=1):
        BFGS(FrechetCellFilter(atoms), logfile=None).run(fmax=fmax, steps=steps)
    return atoms


def npt_window_means(
    atoms: Atoms,
    calculator: Calculator,
    *,
    seed: int,
    temperature_K: float,
    timestep_fs: float,
    steps: int,
    interval: int,
    window: tuple[float, float] = (0.2, 1.0),
) -> tuple[float, float, np.ndarray]:
    """Isotropic MTK NPT at zero pressure (Nose-Hoover chain thermostat, ASE's defaults for
    the chain), velocities from one default_rng(seed); mean potential energy (eV), mean
    volume (A^3) and mean cell lengths (A) over the samples every `interval` steps that
    fall inside the window, given as fractions of the run."""
    atoms = atoms.copy()
    atoms.calc = calculator
    rng = np.random.default_rng(seed)
    MaxwellBoltzmannDistribution(atoms, temperature_K=temperature_K, rng=rng)
    Stationary(atoms)
    dynamics = IsotropicMTKNPT(
        atoms,
        timestep_fs * units.fs,
        temperature_K=temperature_K,
        pressure_au=0.0,
        tdamp=100 * units.fs,
        pdamp=1000 * units.fs,
    )
    samples: list[tuple[float, float, float, np.ndarray]] = []

    def sample() -> None:
        if dynamics.nsteps % interval == 0 or dynamics.nsteps == steps:
            samples.append(
                (
                    dynamics.nsteps * timestep_fs,
                    float(atoms.get_potential_energy()),
                    float(atoms.get_volume()),
                    atoms.cell.lengths(),
                )
            )

    dynamics.attach(sample, interval=1)
    with threadpool_limits(limits=1):
        dynamics.run(steps)
    duration = steps * timestep_fs
    inside = [s for s in samples if window[0] * duration <= s[0] <= window[1] * duration]
    return (
        float(np.mean([s[1] for s in inside])),
        float(np.mean([s[2] for s in inside])),
        np.mean([s[3] for s in inside], axis=0),
    )


def hop_endpoints() -> tuple[Atoms, Atoms]:
    """A Ni adatom hopping between neighbouring hollow sites of Cu(001): a 2x2x3 slab with
    the bottom two layers fixed, both ends relaxed with EMT (BFGS, 0.03 eV/A)."""
    slab = fcc100("Cu", size=(2, 2, 3))
    add_adsorbate(slab, "Ni", 1.7, "hollow")
    slab.center(axis=2, vacuum=4.0)
    slab.set_constraint(FixAtoms(mask=[atom.tag > 1 for atom in slab]))
    final = slab.copy()
    final[-1].x += final.get_cell()[0, 0] / 2
    ends = []
    for end in (slab, final):
        end.calc = EMT()
        with threadpool_limits(limits=1):
            BFGS(end, logfile=None).run(fmax=0.03, steps=200)
        end.calc = None
        ends.append(end)
    return ends[0], ends[1]


def neb_band(
    initial: Atoms, final: Atoms, make: Callable[[], Calculator], images: int, fmax: float
) -> list[float]:
    """ASE's NEB (improved tangent, no climbing image, linear interpolation, FIRE), one
    calculator per image as ASE recommends; the image energies, ends included."""
    band_images = [initial.copy() for _ in range(images + 1)] + [final.copy()]
    for image in band_images:
        image.calc = make()
    band = NEB(band_images, k=0.1, climb=False, method="improvedtangent")
    band.interpolate(method="linear")
    with threadpool_limits(limits=1):
        FIRE(band, logfile=None).run(fmax=fmax, steps=500)
    return [float(image.get_potential_energy()) for image in band_images]


def assert_summary_matches_rows(report: ComparisonPublic) -> None:
    """The summary against numpy over the rows' own values."""
    for metric in METRICS:
        values = np.array([v for row in report.rows if (v := getattr(row, metric)) is not None])
        stats = report.summary[metric]
        assert stats.count == len(values), metric
        if not len(values):
            assert stats.mean is stats.rms is stats.max_abs is None
            continue
        expected: dict[str, Any] = {
            "mean": values.mean(),
            "mean_abs": np.abs(values).mean(),
            "rms": np.sqrt((values**2).mean()),
            "max_abs": np.abs(values).max(),
        }
        for name, value in expected.items():
            # The service sums with math.fsum, numpy pairwise: they may differ in a few ulps.
            assert getattr(stats, name) == pytest.approx(value, rel=1e-13, abs=0), (metric, name)
