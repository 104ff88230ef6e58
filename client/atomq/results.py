"""Results and provenance records as the service returns them.

Energies in eV, forces in eV/Angstrom, stress in eV/Angstrom^3 as ASE's
Voigt 6-vector (xx, yy, zz, yz, xz, xy).
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Literal

from pydantic import BaseModel, Field, JsonValue

from atomq.structure import Structure, Vec3

Voigt6 = tuple[float, float, float, float, float, float]


class SinglePointResult(BaseModel):
    kind: Literal["single_point"] = "single_point"
    energy: float = Field(description="Potential energy, eV.")
    forces: list[Vec3] = Field(description="Forces, eV/Angstrom.")
    stress: Voigt6 | None = Field(
        default=None, description="Stress, eV/Angstrom^3, Voigt order; periodic structures only."
    )
    structure: Structure


class RelaxStep(BaseModel):
    step: int
    energy: float = Field(description="Potential energy, eV.")
    fmax: float = Field(
        description="Largest force (cell degrees of freedom included), eV/Angstrom."
    )


class RelaxResult(BaseModel):
    kind: Literal["relax"] = "relax"
    energy: float = Field(description="Final potential energy, eV.")
    forces: list[Vec3]
    stress: Voigt6 | None = None
    structure: Structure = Field(description="The final structure.")
    converged: bool = Field(description="False when max_steps was reached first.")
    steps: int = Field(description="Optimizer steps taken.")
    trace: list[RelaxStep] = Field(description="Energy and fmax after every step (step 0 first).")


class ThermoRow(BaseModel):
    step: int
    time_fs: float
    temperature_K: float
    potential_energy: float = Field(description="eV")
    kinetic_energy: float = Field(description="eV")
    total_energy: float = Field(description="eV")
    pressure_GPa: float | None = Field(default=None, description="Periodic structures only.")
    volume: float | None = Field(default=None, description="Angstrom^3, periodic only.")


class RadialDistribution(BaseModel):
    pair: tuple[str, str]
    r: list[float] = Field(description="Bin centres, Angstrom.")
    g: list[float] = Field(description="g(r), dimensionless, averaged over the frames.")


class MeanSquaredDisplacement(BaseModel):
    element: str
    time_fs: list[float]
    msd: list[float] = Field(description="Angstrom^2, centre-of-mass drift removed.")
    diffusion_coefficient_A2_per_ps: float | None = Field(
        description="Einstein relation D = slope / 6 over the fit window; None when fewer "
        "than two frames fall inside it."
    )
    diffusion_coefficient_cm2_per_s: float | None
    fit_window_fs: tuple[float, float]


class MDAnalysis(BaseModel):
    """Computed by the worker from the thermo rows and sampled frames."""

    analysis_window_fs: tuple[float, float] = Field(
        description="Averages and fits use the rows and frames in this time window."
    )
    temperature_mean_K: float
    temperature_std_K: float
    energy_drift_meV_per_atom_per_ps: float | None = Field(
        default=None, description="NVE only: slope of a straight-line fit of the total energy."
    )
    energy_max_deviation_meV_per_atom: float | None = Field(
        default=None, description="NVE only: largest |E_total - E_total(0)|."
    )
    rdf: list[RadialDistribution] = Field(default_factory=list)
    msd: list[MeanSquaredDisplacement] = Field(default_factory=list)
    density_mean_g_per_cm3: float | None = Field(default=None, description="Periodic only.")
    volume_mean_A3: float | None = None
    cell_lengths_mean_A: tuple[float, float, float] | None = Field(default=None, description="NPT.")
    cell_angles_mean_deg: tuple[float, float, float] | None = Field(
        default=None, description="NPT."
    )


class MDResult(BaseModel):
    kind: Literal["md"] = "md"
    energy: float = Field(description="Potential energy of the final frame, eV.")
    forces: list[Vec3]
    stress: Voigt6 | None = None
    structure: Structure = Field(description="The final frame, momenta included.")
    steps: int
    seed: int
    thermo: list[ThermoRow]
    analysis: MDAnalysis


class NEBImage(BaseModel):
    index: int
    path_coordinate: float = Field(description="Distance along the band, Angstrom.")
    energy: float = Field(description="eV")


class NEBResult(BaseModel):
    kind: Literal["neb"] = "neb"
    energy: float = Field(description="Energy of the highest image, eV.")
    forces: list[Vec3] = Field(description="Forces on the highest image.")
    stress: Voigt6 | None = None
    structure: Structure = Field(description="The highest image.")
    highest_image: int
    forward_barrier: float = Field(description="E(highest) - E(initial), eV.")
    reverse_barrier: float = Field(description="E(highest) - E(final), eV.")
    reaction_energy: float = Field(description="E(final) - E(initial), eV.")
    profile: list[NEBImage]
    converged: bool
    steps: int


Result = Annotated[
    SinglePointResult | RelaxResult | MDResult | NEBResult, Field(discriminator="kind")
]
ResultModel = SinglePointResult | RelaxResult | MDResult | NEBResult


class ArtifactRecord(BaseModel):
    """A file a job wrote (a trajectory, a thermo log), fetched by id through the API."""

    id: int
    name: str
    media_type: str
    size: int = Field(description="Bytes.")
    sha256: str


class Provenance(BaseModel):
    """Who and what produced a result. Written once, with the result, never edited."""

    job_id: int
    owner: str
    input_hash: str
    input_hash_version: int = Field(
        default=1,
        description="The canonical form the hash covers (atomq.hashing); 1 before versions.",
    )
    calculator: str = Field(description="Exact registered version, name@version.")
    backend: str
    parameters: dict[str, JsonValue]
    weights_sha256: str | None
    packages: dict[str, str] = Field(description="Versions of python, atomq, ase, numpy, backend.")
    atomq_commit: str | None = Field(
        default=None,
        description="The git commit of the atomq code that ran, when it ran from a work "
        "tree; absent for a release install and in records from before it was kept.",
    )
    atomq_dirty: bool | None = Field(
        default=None,
        description="Whether that work tree's tracked files differed from the commit.",
    )
    host: str
    pid: int
    cpu: str
    threads: dict[str, int]
    seed: int | None
    attempt: int
    parents: list[int] = Field(default_factory=list)
    artifacts: list[ArtifactRecord] = Field(default_factory=list)
    started_at: datetime
    finished_at: datetime
    compute_s: float | None = Field(
        default=None,
        description="Seconds the task itself ran in the worker (the calculation; not the "
        "queue, loading the model or recording); absent in records from before it was kept.",
    )
