"""Analysis of an MD run, accumulated while it runs so that no frames are held in memory."""

from __future__ import annotations

import numpy as np
from ase import Atoms
from ase.data import atomic_masses, atomic_numbers
from ase.neighborlist import neighbor_list

from atomq.results import MDAnalysis, MeanSquaredDisplacement, RadialDistribution, ThermoRow
from atomq.tasks import MD

AMU_PER_A3_IN_G_PER_CM3 = 1.66053906660  # 1 amu / 1 Angstrom^3 in g/cm^3 (CODATA 2018)
A2_PER_PS_IN_CM2_PER_S = 1e-4  # 1 Angstrom^2/ps = 1e-16 cm^2 / 1e-12 s


class DisplacementTracker:
    """Mean squared displacement per element from the first frame, centre-of-mass drift
    removed. ASE's integrators do not wrap positions, so displacements are unwrapped."""

    def __init__(self, atoms: Atoms) -> None:
        self.origin = atoms.get_positions().copy()
        self.masses = atoms.get_masses()
        symbols = np.array(atoms.get_chemical_symbols())
        self.groups = {element: symbols == element for element in dict.fromkeys(symbols)}
        self.times: list[float] = []
        self.msd: dict[str, list[float]] = {element: [] for element in self.groups}

    def sample(self, atoms: Atoms, time_fs: float) -> None:
        displacement = atoms.get_positions() - self.origin
        drift = (self.masses[:, None] * displacement).sum(axis=0) / self.masses.sum()
        squared = ((displacement - drift) ** 2).sum(axis=1)
        self.times.append(time_fs)
        for element, members in self.groups.items():
            self.msd[element].append(float(squared[members].mean()))


class RadialDistributionAccumulator:
    """g(r) for one element pair, averaged over frames, from ASE's neighbour list
    (linear in the number of atoms, unlike a full distance matrix)."""

    def __init__(self, atoms: Atoms, pair: tuple[str, str], rmax: float, nbins: int) -> None:
        self.pair = pair
        self.rmax = rmax
        self.edges = np.linspace(0.0, rmax, nbins + 1)
        self.counts = np.zeros(nbins)
        self.normalisation = 0.0
        numbers = atoms.numbers
        self.first = numbers == atomic_numbers[pair[0]]
        self.second = numbers == atomic_numbers[pair[1]]
        self.frames: list[tuple[float, np.ndarray, float]] = []

    def sample(self, atoms: Atoms, time_fs: float) -> None:
        i, j, d = neighbor_list("ijd", atoms, self.rmax)
        chosen = self.first[i] & self.second[j]
        counts, _ = np.histogram(d[chosen], bins=self.edges)
        # Ideal-gas pairs at the second element's density around each first-element atom.
        n_first = int(self.first.sum())
        n_second = int(self.second.sum()) - (1 if self.pair[0] == self.pair[1] else 0)
        density = n_second / atoms.get_volume()
        self.frames.append((time_fs, counts.astype(float), n_first * density))

    def result(self, window_fs: tuple[float, float]) -> RadialDistribution:
        chosen = [f for f in self.frames if window_fs[0] <= f[0] <= window_fs[1]] or self.frames
        counts = sum(f[1] for f in chosen)
        ideal = sum(f[2] for f in chosen)
        shells = 4.0 / 3.0 * np.pi * (self.edges[1:] ** 3 - self.edges[:-1] ** 3)
        g = counts / (ideal * shells)
        centres = 0.5 * (self.edges[1:] + self.edges[:-1])
        return RadialDistribution(pair=self.pair, r=centres.tolist(), g=g.tolist())


def analyse(
    task: MD,
    atoms: Atoms,
    thermo: list[ThermoRow],
    cell_parameters: list[tuple[float, np.ndarray]],
    displacements: DisplacementTracker,
    rdfs: list[RadialDistributionAccumulator],
) -> MDAnalysis:
    """Averages over the analysis window; `cell_parameters` are (time_fs, ASE cellpar)
    sampled with the thermo rows."""
    duration = (thermo[-1].time_fs if thermo else 0.0) or task.steps * task.timestep_fs
    window = (task.analysis_window[0] * duration, task.analysis_window[1] * duration)
    in_window = [row for row in thermo if window[0] <= row.time_fs <= window[1]] or thermo
    temperatures = np.array([row.temperature_K for row in in_window])
    n = len(atoms)
    drift = deviation = None
    if task.ensemble == "nve" and len(thermo) >= 2:
        # Over the whole run: a symplectic integrator's energy must neither drift nor wander.
        times_ps = np.array([row.time_fs for row in thermo]) / 1000.0
        totals = np.array([row.total_energy for row in thermo]) / n
        drift = float(np.polyfit(times_ps, totals, 1)[0] * 1000.0)
        deviation = float(np.abs(totals - totals[0]).max() * 1000.0)
    volumes = [row.volume for row in in_window if row.volume is not None]
    density = volume = None
    lengths: tuple[float, float, float] | None = None
    angles: tuple[float, float, float] | None = None
    if volumes:
        volume = float(np.mean(volumes))
        mass = float(atomic_masses[atoms.numbers].sum())
        density = mass / volume * AMU_PER_A3_IN_G_PER_CM3
    cells = [c for t, c in cell_parameters if window[0] <= t <= window[1]]
    if task.ensemble == "npt" and cells:
        mean = np.mean(cells, axis=0)
        lengths = (float(mean[0]), float(mean[1]), float(mean[2]))
        angles = (float(mean[3]), float(mean[4]), float(mean[5]))
    return MDAnalysis(
        analysis_window_fs=window,
        temperature_mean_K=float(temperatures.mean()) if len(temperatures) else 0.0,
        temperature_std_K=float(temperatures.std()) if len(temperatures) else 0.0,
        energy_drift_meV_per_atom_per_ps=drift,
        energy_max_deviation_meV_per_atom=deviation,
        rdf=[rdf.result(window) for rdf in rdfs],
        msd=mean_squared_displacements(displacements, window),
        density_mean_g_per_cm3=density,
        volume_mean_A3=volume,
        cell_lengths_mean_A=lengths,
        cell_angles_mean_deg=angles,
    )


def mean_squared_displacements(
    tracker: DisplacementTracker, window_fs: tuple[float, float]
) -> list[MeanSquaredDisplacement]:
    times = np.array(tracker.times)
    chosen = (times >= window_fs[0]) & (times <= window_fs[1])
    results = []
    for element, values in tracker.msd.items():
        msd = np.array(values)
        d_a2_per_ps = d_cm2_per_s = None
        if chosen.sum() >= 2:
            slope = float(np.polyfit(times[chosen], msd[chosen], 1)[0])  # Angstrom^2 / fs
            d_a2_per_ps = slope / 6.0 * 1000.0  # Einstein relation in 3D: MSD = 6 D t
            d_cm2_per_s = d_a2_per_ps * A2_PER_PS_IN_CM2_PER_S
        results.append(
            MeanSquaredDisplacement(
                element=element,
                time_fs=times.tolist(),
                msd=msd.tolist(),
                diffusion_coefficient_A2_per_ps=d_a2_per_ps,
                diffusion_coefficient_cm2_per_s=d_cm2_per_s,
                fit_window_fs=window_fs,
            )
        )
    return results
