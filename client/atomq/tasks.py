"""Task specs: what to compute on a structure.

Each task kind is a pydantic model with a `kind` literal; `TaskSpec` is their
discriminated union, so new kinds (md, neb) join without changing these.
Units are ASE's: eV, Angstrom, eV/Angstrom, eV/Angstrom^3.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field


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


TaskSpec = Annotated[SinglePoint | Relax, Field(discriminator="kind")]
TaskKind = Literal["single_point", "relax"]


def task_steps(task: SinglePoint | Relax) -> int:
    """The number of steps a task may take, for limits and progress."""
    if isinstance(task, Relax):
        return task.max_steps
    return 1
