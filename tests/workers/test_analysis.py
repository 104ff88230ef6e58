"""The worker's MD analysis against outside references: ASE's own g(r), displacements and
energies whose answer is known by construction, the Einstein relation, CODATA units."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk
from ase.geometry.rdf import get_rdf
from ase.units import kB

from atomq.results import ThermoRow
from atomq.tasks import MD
from atomq_workers.analysis import (
    DisplacementTracker,
    RadialDistributionAccumulator,
    analyse,
)

# Lattice constants at room temperature: Cu 3.615, Ni 3.524 Angstrom (Kittel, Introduction
# to Solid State Physics; recalled from memory). A 50/50 Cu-Ni alloy takes about their
# mean by Vegard's law: 3.57 Angstrom.
CU_A = 3.615
CUNI_A = 3.57
# Standard atomic weights in amu (IUPAC; recalled from memory).
CU_MASS = 63.546
NI_MASS = 58.6934
# 1 amu = 1.66053906660e-24 g (CODATA 2018) and 1 Angstrom^3 = 1e-24 cm^3.
G_PER_CM3_PER_AMU_PER_A3 = 1.66053906660


def copper_108() -> Atoms:
    atoms: Atoms = bulk("Cu", "fcc", a=CU_A, cubic=True).repeat(3)
    return atoms


def cuni_alloy_108(seed: int = 11) -> Atoms:
    """A random substitutional Cu-Ni alloy: 54 Cu and 54 Ni on 108 fcc sites."""
    atoms: Atoms = bulk("Cu", "fcc", a=CUNI_A, cubic=True).repeat(3)
    symbols = np.array(["Cu"] * 54 + ["Ni"] * 54)
    np.random.default_rng(seed).shuffle(symbols)
    atoms.set_chemical_symbols(symbols.tolist())
    return atoms


def rattled_frames(atoms: Atoms, count: int) -> list[Atoms]:
    frames = []
    for seed in range(count):
        frame = atoms.copy()
        frame.rattle(stdev=0.08, seed=seed)
        frames.append(frame)
    return frames


# -- radial distribution functions against ASE's get_rdf ---------------------------------
RMAX = 5.0  # below half of the 3x3x3 cells' thickness (10.85 and 10.71 Angstrom)
NBINS = 100


def accumulate(
    frames: list[Atoms], pair: tuple[str, str], window_fs: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray]:
    """Frames sampled 10 fs apart; g(r) over the window."""
    accumulator = RadialDistributionAccumulator(frames[0], pair, RMAX, NBINS)
    for k, frame in enumerate(frames):
        accumulator.sample(frame, time_fs=10.0 * k)
    result = accumulator.result(window_fs)
    assert result.pair == pair
    return np.array(result.r), np.array(result.g)


def test_copper_rdf_equals_ase_get_rdf_up_to_the_self_pair_factor() -> None:
    """Outside reference: ASE's get_rdf (ase.geometry.rdf) on the same frames, rmax, bins.

    ASE normalises the same-element partial by the density N/V of all N atoms; ours by
    (N-1)/V, the other atoms an atom can see, so that g -> 1 at large r even in a small
    cell. Ours is therefore ASE's times N/(N-1), exactly; beyond that factor both count
    the same pairs into the same shells, so they agree to rounding.
    """
    frames = rattled_frames(copper_108(), 3)
    n = len(frames[0])
    r, g = accumulate(frames, ("Cu", "Cu"), (0.0, 20.0))

    g_ase, r_ase = get_rdf(frames, RMAX, NBINS, elements=(29, 29))

    np.testing.assert_allclose(r, r_ase, rtol=1e-14)
    np.testing.assert_allclose(g, g_ase * n / (n - 1), rtol=1e-12, atol=1e-12)
    # The check is not empty: the first neighbour shell (a / sqrt(2) = 2.556 Angstrom)
    # is a strong peak, and nothing sits closer than about 2 Angstrom.
    assert g.max() > 5
    assert abs(r[g.argmax()] - CU_A / np.sqrt(2)) < 0.1
    assert not g[r < 1.5].any()


@pytest.mark.parametrize(("pair", "elements"), [(("Cu", "Ni"), (29, 28)), (("Ni", "Cu"), (28, 29))])
def test_alloy_partial_rdf_equals_ase_get_rdf(
    pair: tuple[str, str], elements: tuple[int, int]
) -> None:
    """Outside reference: ASE's get_rdf partial for two different elements normalises by
    N_first * N_second / V, as ours does, so the two agree to rounding with no factor."""
    frames = rattled_frames(cuni_alloy_108(), 2)
    r, g = accumulate(frames, pair, (0.0, 10.0))

    g_ase, r_ase = get_rdf(frames, RMAX, NBINS, elements=elements)

    np.testing.assert_allclose(r, r_ase, rtol=1e-14)
    np.testing.assert_allclose(g, g_ase, rtol=1e-12, atol=1e-12)
    assert g.max() > 5


def test_rdf_uses_only_the_frames_in_the_window() -> None:
    """Frames at 0, 10, 20 fs; a window from 10 fs must give ASE's g(r) of the last two."""
    frames = rattled_frames(copper_108(), 3)
    n = len(frames[0])
    _, g = accumulate(frames, ("Cu", "Cu"), (10.0, 20.0))
    g_ase = get_rdf(frames[1:], RMAX, NBINS, elements=(29, 29), no_dists=True)
    np.testing.assert_allclose(g, g_ase * n / (n - 1), rtol=1e-12, atol=1e-12)
    g_all = get_rdf(frames, RMAX, NBINS, elements=(29, 29), no_dists=True)
    assert not np.allclose(g, g_all * n / (n - 1), rtol=1e-6)  # the window made a difference


# -- mean squared displacement -----------------------------------------------------------
def test_uniform_translation_gives_zero_msd() -> None:
    """Centre-of-mass drift is removed: a rigid shift of every atom, larger than the cell,
    is no displacement at all."""
    atoms = cuni_alloy_108()
    tracker = DisplacementTracker(atoms)
    moved = atoms.copy()
    moved.positions += (25.0, -3.0, 7.5)
    tracker.sample(atoms, 0.0)
    tracker.sample(moved, 100.0)
    assert tracker.times == [0.0, 100.0]
    for element in ("Cu", "Ni"):
        assert tracker.msd[element] == pytest.approx([0.0, 0.0], abs=1e-20)


def test_msd_of_known_displacements_is_exact() -> None:
    """Displacements chosen so the answer is known by hand.

    Every atom shifts by T (pure drift). On top, Cu atoms move by c + d on one half and
    c - d on the other; Ni atoms all move by b, with b chosen so that the mass-weighted
    mean of (c +- d, b) is zero: the centre of mass moves by T alone. Then, per element,
    MSD_Cu = mean |c +- d|^2 = |c|^2 + |d|^2 and MSD_Ni = |b|^2.
    """
    atoms = cuni_alloy_108()
    symbols = np.array(atoms.get_chemical_symbols())
    cu = np.flatnonzero(symbols == "Cu")
    ni = np.flatnonzero(symbols == "Ni")
    translation = np.array([12.0, 0.0, -4.0])  # beyond the cell: positions are unwrapped
    c = np.array([0.3, 0.0, 0.0])
    d = np.array([0.0, 0.4, 0.0])
    b = -c * (len(cu) * CU_MASS) / (len(ni) * NI_MASS)

    moved = atoms.copy()
    moved.positions += translation
    moved.positions[cu[::2]] += c + d
    moved.positions[cu[1::2]] += c - d
    moved.positions[ni] += b

    tracker = DisplacementTracker(atoms)
    tracker.sample(moved, 50.0)

    # |c|^2 + |d|^2 = 0.09 + 0.16 = 0.25 Angstrom^2.
    assert tracker.msd["Cu"] == pytest.approx([0.25], rel=1e-9)
    # |b|^2 with b = -0.3 * 63.546 / 58.6934 Angstrom (equal numbers of Cu and Ni atoms);
    # ASE's masses are the IUPAC weights used here.
    assert tracker.msd["Ni"] == pytest.approx([(0.3 * CU_MASS / NI_MASS) ** 2], rel=1e-9)


# -- analyse() on synthetic runs -----------------------------------------------------------
def thermo_rows(
    natoms: int,
    times_fs: np.ndarray,
    total_per_atom: np.ndarray,
    temperatures: np.ndarray,
    volumes: np.ndarray | None = None,
) -> list[ThermoRow]:
    """Rows with the kinetic energy of the temperature (equipartition, 3/2 N kB T) and
    the rest of the total as potential energy."""
    rows = []
    for k, (t, e, temperature) in enumerate(
        zip(times_fs, total_per_atom, temperatures, strict=True)
    ):
        kinetic = 1.5 * natoms * kB * temperature
        total = natoms * e
        rows.append(
            ThermoRow(
                step=5 * k,
                time_fs=float(t),
                temperature_K=float(temperature),
                potential_energy=float(total - kinetic),
                kinetic_energy=float(kinetic),
                total_energy=float(total),
                volume=None if volumes is None else float(volumes[k]),
            )
        )
    return rows


def nve_task() -> MD:
    # 500 steps of 2 fs: 1 ps, thermo every 5 steps; averages over the last 80 %.
    return MD(
        ensemble="nve",
        temperature_K=300,
        timestep_fs=2.0,
        steps=500,
        thermo_interval=5,
        analysis_window=(0.2, 1.0),
    )


TIMES_FS = np.arange(0.0, 1000.0 + 1e-9, 10.0)  # step * 2 fs, every 5 steps


@pytest.mark.parametrize("rate_meV_per_atom_per_ps", [0.8, -0.35])
def test_energy_drift_and_deviation_of_a_linear_total_energy(
    rate_meV_per_atom_per_ps: float,
) -> None:
    atoms = copper_108()
    n = len(atoms)
    # -3.49 eV/atom: copper's cohesive energy (Kittel; recalled from memory), an offset.
    total = -3.49 + rate_meV_per_atom_per_ps * 1e-3 * TIMES_FS / 1000.0
    rows = thermo_rows(n, TIMES_FS, total, np.full(len(TIMES_FS), 300.0))

    analysis = analyse(nve_task(), atoms, rows, [], DisplacementTracker(atoms), [])

    assert analysis.energy_drift_meV_per_atom_per_ps == pytest.approx(
        rate_meV_per_atom_per_ps, rel=1e-6
    )
    # Largest |E(t) - E(0)| is at the end, after 1 ps.
    assert analysis.energy_max_deviation_meV_per_atom == pytest.approx(
        abs(rate_meV_per_atom_per_ps) * 1.0, rel=1e-6
    )


def test_energy_drift_is_reported_for_nve_only() -> None:
    atoms = copper_108()
    rows = thermo_rows(len(atoms), TIMES_FS, -3.49 + 1e-6 * TIMES_FS, np.full(101, 300.0))
    task = MD(
        ensemble="nvt",
        thermostat="bussi",
        temperature_K=300,
        timestep_fs=2.0,
        steps=500,
        thermo_interval=5,
    )
    analysis = analyse(task, atoms, rows, [], DisplacementTracker(atoms), [])
    assert analysis.energy_drift_meV_per_atom_per_ps is None
    assert analysis.energy_max_deviation_meV_per_atom is None


def test_temperature_statistics_are_numpy_over_the_window() -> None:
    atoms = copper_108()
    temperatures = np.random.default_rng(3).normal(300.0, 20.0, len(TIMES_FS))
    # The first 20 % (equilibration) is much hotter: including it would move the mean.
    temperatures[TIMES_FS < 200.0] += 500.0
    rows = thermo_rows(len(atoms), TIMES_FS, np.full(len(TIMES_FS), -3.49), temperatures)

    analysis = analyse(nve_task(), atoms, rows, [], DisplacementTracker(atoms), [])

    assert analysis.analysis_window_fs == (200.0, 1000.0)
    inside = temperatures[(TIMES_FS >= 200.0) & (TIMES_FS <= 1000.0)]
    assert len(inside) == 81
    assert analysis.temperature_mean_K == pytest.approx(np.mean(inside), rel=1e-12)
    assert analysis.temperature_std_K == pytest.approx(np.std(inside), rel=1e-12)


def test_diffusion_coefficient_from_the_einstein_relation() -> None:
    """Einstein relation in 3D: MSD(t) = 6 D t + const at long times. Positions are built
    so the Cu MSD is exactly that inside the window, and ballistic (t^2) before it."""
    d_a2_per_ps = 0.25  # a liquid-metal order of magnitude, 2.5e-5 cm^2/s
    offset = 0.4  # Angstrom^2, the ballistic start every real MSD carries
    atoms = copper_108()
    # Unit displacement directions in +- pairs: mean |e|^2 = 1 and no centre-of-mass motion.
    directions = np.random.default_rng(5).normal(size=(len(atoms) // 2, 3))
    directions /= np.linalg.norm(directions, axis=1)[:, None]
    directions = np.concatenate([directions, -directions])

    tracker = DisplacementTracker(atoms)
    frame_times = np.arange(0.0, 1000.0 + 1e-9, 50.0)
    for t in frame_times:
        if t >= 200.0:
            msd = 6 * d_a2_per_ps / 1000.0 * t + offset
        else:
            msd = (6 * d_a2_per_ps / 1000.0 * 200.0 + offset) * (t / 200.0) ** 2
        frame = atoms.copy()
        frame.positions += np.sqrt(msd) * directions
        tracker.sample(frame, float(t))
    rows = thermo_rows(len(atoms), TIMES_FS, np.full(len(TIMES_FS), -3.49), np.full(101, 300.0))

    analysis = analyse(nve_task(), atoms, rows, [], tracker, [])

    (cu,) = analysis.msd
    assert cu.element == "Cu"
    assert cu.time_fs == frame_times.tolist()
    assert cu.fit_window_fs == (200.0, 1000.0)
    assert cu.diffusion_coefficient_A2_per_ps == pytest.approx(d_a2_per_ps, rel=1e-9)
    # 1 Angstrom^2/ps = 1e-16 cm^2 / 1e-12 s = 1e-4 cm^2/s.
    assert cu.diffusion_coefficient_cm2_per_s == pytest.approx(2.5e-5, rel=1e-9)


def alloy_density_by_hand(volume_a3: float) -> float:
    """54 Cu and 54 Ni atoms in volume_a3, in g/cm^3 (IUPAC weights, CODATA amu)."""
    return (54 * CU_MASS + 54 * NI_MASS) / volume_a3 * G_PER_CM3_PER_AMU_PER_A3


def test_density_is_mass_over_volume_in_the_window() -> None:
    atoms = cuni_alloy_108()
    volume = atoms.get_volume()  # (3 * 3.57)^3 = 1228.4 Angstrom^3
    # Outside the window the cell is 5 % larger; those rows must not count.
    volumes = np.where(TIMES_FS < 200.0, 1.05 * volume, volume)
    rows = thermo_rows(
        len(atoms), TIMES_FS, np.full(len(TIMES_FS), -3.49), np.full(101, 300.0), volumes
    )

    analysis = analyse(nve_task(), atoms, rows, [], DisplacementTracker(atoms), [])

    assert analysis.volume_mean_A3 == pytest.approx(volume, rel=1e-12)
    assert analysis.density_mean_g_per_cm3 == pytest.approx(alloy_density_by_hand(volume), rel=1e-9)


def test_copper_density_matches_the_handbook() -> None:
    """Handbook check: copper's density is 8.96 g/cm^3 at room temperature (CRC Handbook
    of Chemistry and Physics; recalled from memory). Four atoms per cubic cell of
    a = 3.615 Angstrom must come within 1 %."""
    atoms = copper_108()
    volumes = np.full(len(TIMES_FS), atoms.get_volume())
    rows = thermo_rows(
        len(atoms), TIMES_FS, np.full(len(TIMES_FS), -3.49), np.full(101, 300.0), volumes
    )
    analysis = analyse(nve_task(), atoms, rows, [], DisplacementTracker(atoms), [])
    assert analysis.density_mean_g_per_cm3 == pytest.approx(8.96, rel=0.01)


# -- known defects -------------------------------------------------------------------------
def test_no_diffusion_coefficient_of_zero_for_a_growing_msd_with_one_frame_in_window() -> None:
    atoms = copper_108()
    directions = np.random.default_rng(5).normal(size=(len(atoms) // 2, 3))
    directions /= np.linalg.norm(directions, axis=1)[:, None]
    directions = np.concatenate([directions, -directions])
    tracker = DisplacementTracker(atoms)
    # Frames at the start and the end only (frame_interval = steps): MSD grows 0 -> 1.5.
    for t, msd in ((0.0, 0.0), (1000.0, 1.5)):
        frame = atoms.copy()
        frame.positions += np.sqrt(msd) * directions
        tracker.sample(frame, t)
    rows = thermo_rows(len(atoms), TIMES_FS, np.full(len(TIMES_FS), -3.49), np.full(101, 300.0))

    (cu,) = analyse(nve_task(), atoms, rows, [], tracker, []).msd

    assert cu.msd == pytest.approx([0.0, 1.5], rel=1e-9)  # the MSD did grow
    assert cu.diffusion_coefficient_A2_per_ps != 0.0
