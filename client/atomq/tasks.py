"""Task specs: what to compute on a structure.

Each task kind is a pydantic model with a `kind` literal; `TaskSpec` is their
discriminated union, so new kinds (md, neb) join without changing these.
Units are ASE's: eV, Angstrom, eV/Angstrom, eV/Angstrom^3.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from atomq.structure import Structure


class SinglePoint(BaseModel):
    """Energy and forces of one structure, and the stress when it is periodic in 3D."""

    model_config = ConfigDict(extra="forbid")
    kind: Literal["single_point"] = "single_point"


class CellRelax(BaseModel):
    """Let the cell relax too, through ASE's FrechetCellFilter."""

    model_config = ConfigDict(extra="forbid")
    scalar_pressure: float = Field(
        default=0.0, description="External pressure in eV/Angstrom^3 (1 GPa = 0.00624151)."
    )
    hydrostatic_strain: bool = Field(
        default=False, description="Only scale the cell uniformly (keep its shape)."
    )
    constant_volume: bool = Field(default=False, description="Change the shape, keep the volume.")


class Relax(BaseModel):
    """Minimise the energy with one of ASE's optimizers until every force is below fmax."""

    model_config = ConfigDict(extra="forbid")
    kind: Literal["relax"] = "relax"
    optimizer: Literal["BFGS", "LBFGS", "FIRE"] = "BFGS"
    fmax: float = Field(default=0.05, gt=0, description="Convergence threshold in eV/Angstrom.")
    max_steps: int = Field(default=500, ge=1, description="Optimizer steps before giving up.")
    cell: CellRelax | None = Field(
        default=None, description="Relax the cell as well; needs a structure periodic in 3D."
    )


class MD(BaseModel):
    """Molecular dynamics with ASE's own integrators.

    nve: velocity Verlet. nvt: Langevin, Bussi (stochastic velocity rescaling) or a
    Nose-Hoover chain. npt: ASE's MTK barostat with a Nose-Hoover chain thermostat,
    isotropic or anisotropic. Every random number comes from numpy's
    default_rng(seed): first the Maxwell-Boltzmann velocities, then the thermostat's
    noise, so a job with the same seed reruns exactly.
    """

    model_config = ConfigDict(extra="forbid")
    kind: Literal["md"] = "md"
    ensemble: Literal["nve", "nvt", "npt"]
    thermostat: Literal["langevin", "bussi", "nose_hoover_chain"] | None = Field(
        default=None, description="Required for nvt; npt always uses a Nose-Hoover chain."
    )
    temperature_K: float | None = Field(
        default=None,
        ge=0,
        description="Target temperature (nvt, npt) and the temperature of the initial "
        "Maxwell-Boltzmann velocities.",
    )
    timestep_fs: float = Field(gt=0, le=20, description="Time step in femtoseconds.")
    steps: int = Field(ge=1, description="Number of MD steps.")
    friction_per_fs: float = Field(default=0.01, gt=0, description="Langevin friction, 1/fs.")
    thermostat_time_fs: float = Field(
        default=100.0, gt=0, description="Bussi / Nose-Hoover relaxation time, fs."
    )
    pressure_GPa: float = Field(default=0.0, description="External pressure for npt, GPa.")
    barostat_time_fs: float = Field(default=1000.0, gt=0, description="Barostat time, fs.")
    cell_flexibility: Literal["isotropic", "anisotropic"] = Field(
        default="isotropic", description="npt: scale the cell uniformly, or let it deform."
    )
    initial_velocities: Literal["maxwell_boltzmann", "from_structure"] = Field(
        default="maxwell_boltzmann",
        description="Draw velocities at temperature_K (centre-of-mass momentum removed), "
        "or keep the momenta carried by the structure.",
    )
    frame_interval: int = Field(default=10, ge=1, description="Steps between trajectory frames.")
    thermo_interval: int = Field(default=10, ge=1, description="Steps between thermo rows.")
    seed: int | None = Field(
        default=None, ge=0, lt=2**63, description="Drawn and recorded by the service if absent."
    )
    rdf_pairs: list[tuple[str, str]] = Field(
        default_factory=list, description="Element pairs for radial distribution functions."
    )
    rdf_rmax: float = Field(default=6.0, gt=0, description="RDF range, Angstrom.")
    rdf_nbins: int = Field(default=120, ge=10, le=10_000)
    analysis_window: tuple[float, float] = Field(
        default=(0.2, 1.0),
        description="Part of the run, as fractions of its length, over which temperature, "
        "volume and density are averaged and the mean squared displacement is fitted; "
        "the default skips the first 20 % as equilibration.",
    )

    @model_validator(mode="after")
    def _check_ensemble(self) -> MD:
        if self.ensemble == "nvt" and self.thermostat is None:
            raise ValueError(
                "ensemble nvt needs a thermostat: langevin, bussi or nose_hoover_chain"
            )
        if self.ensemble == "nve" and self.thermostat is not None:
            raise ValueError("ensemble nve takes no thermostat; use nvt for a thermostat")
        if self.ensemble == "npt" and self.thermostat not in (None, "nose_hoover_chain"):
            raise ValueError("ensemble npt uses a Nose-Hoover chain thermostat; drop `thermostat`")
        needs_temperature = self.ensemble != "nve" or self.initial_velocities == "maxwell_boltzmann"
        if needs_temperature and self.temperature_K is None:
            raise ValueError(
                "temperature_K is required (target temperature, or the temperature of the "
                "initial Maxwell-Boltzmann velocities)"
            )
        start, end = self.analysis_window
        if not 0 <= start < end <= 1:
            raise ValueError("analysis_window must be two fractions 0 <= start < end <= 1")
        return self


class JobReference(BaseModel):
    """The final structure of a finished job (for example a relaxation) used as input."""

    model_config = ConfigDict(extra="forbid")
    job: int = Field(ge=1, le=2**31 - 1)


Endpoint = Structure | JobReference


class NEB(BaseModel):
    """Nudged elastic band between two endpoints, with ASE's NEB machinery.

    Endpoints are inline structures or references to finished jobs; an ase.Atoms, a
    job id or a Job handle is accepted and converted.
    """

    model_config = ConfigDict(extra="forbid")
    kind: Literal["neb"] = "neb"
    initial: Endpoint
    final: Endpoint
    images: int = Field(default=5, ge=1, le=64, description="Intermediate images.")
    interpolation: Literal["linear", "idpp"] = "idpp"
    climb: bool = Field(default=False, description="Climbing image on the highest image.")
    spring_constant: float = Field(default=0.1, gt=0, description="eV/Angstrom^2.")
    method: Literal["improvedtangent", "aseneb", "eb", "spline", "string"] = "improvedtangent"
    optimizer: Literal["BFGS", "LBFGS", "FIRE", "MDMin"] = "FIRE"
    fmax: float = Field(default=0.05, gt=0, description="eV/Angstrom.")
    max_steps: int = Field(default=500, ge=1)

    @field_validator("initial", "final", mode="before")
    @classmethod
    def _convert_endpoint(cls, value: Any) -> Any:
        from ase import Atoms

        if isinstance(value, Atoms):
            return Structure.from_atoms(value)
        if isinstance(value, int) and not isinstance(value, bool):
            return JobReference(job=value)
        job_id = getattr(value, "id", None)  # a client Job handle
        if isinstance(job_id, int) and not isinstance(value, BaseModel):
            return JobReference(job=job_id)
        return value


TaskSpec = Annotated[SinglePoint | Relax | MD | NEB, Field(discriminator="kind")]
TaskKind = Literal["single_point", "relax", "md", "neb"]
Task = SinglePoint | Relax | MD | NEB


def task_steps(task: Task) -> int:
    """The number of steps a task may take, for limits and progress."""
    if isinstance(task, Relax | NEB):
        return task.max_steps
    if isinstance(task, MD):
        return task.steps
    return 1
