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


Result = Annotated[SinglePointResult | RelaxResult, Field(discriminator="kind")]


class ArtifactRecord(BaseModel):
    name: str
    size: int
    sha256: str


class Provenance(BaseModel):
    """Who and what produced a result. Written once, with the result, never edited."""

    job_id: int
    owner: str
    input_hash: str
    calculator: str = Field(description="Exact registered version, name@version.")
    backend: str
    parameters: dict[str, JsonValue]
    weights_sha256: str | None
    packages: dict[str, str] = Field(description="Versions of python, atomq, ase, numpy, backend.")
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
