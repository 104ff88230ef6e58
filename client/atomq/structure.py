"""The wire form of an atomic structure, and its lossless round trip with ase.Atoms.

Units are ASE's: positions and cell in Angstrom, momenta in ASE units
(amu * Angstrom / ASE time unit), charges in e, magnetic moments in Bohr magnetons.
Floats travel as JSON numbers; Python writes the shortest repr that reads back
to the same float64, so the round trip is exact.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from collections.abc import Iterable
from itertools import chain
from typing import Annotated, Any, Literal

import numpy as np
from ase import Atoms
from ase.constraints import FixAtoms, FixCartesian
from ase.data import chemical_symbols
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    JsonValue,
    StrictBool,
    StrictFloat,
    StrictInt,
    model_validator,
)

# Strict scalars: a number field takes numbers only (not "2.5" or true), a flag booleans.
Vec3 = tuple[StrictFloat, StrictFloat, StrictFloat]
Mask3 = tuple[StrictBool, StrictBool, StrictBool]
Int32 = Annotated[StrictInt, Field(ge=-(2**31), lt=2**31)]
AtomIndex = Annotated[StrictInt, Field(ge=-(2**31), lt=2**31)]


class FixAtomsConstraint(BaseModel):
    """ASE's FixAtoms: the listed atoms do not move."""

    model_config = ConfigDict(extra="forbid")
    type: Literal["FixAtoms"] = "FixAtoms"
    indices: list[AtomIndex]


class FixCartesianConstraint(BaseModel):
    """ASE's FixCartesian: the listed atoms keep the masked Cartesian components."""

    model_config = ConfigDict(extra="forbid")
    type: Literal["FixCartesian"] = "FixCartesian"
    indices: list[AtomIndex]
    mask: Mask3 = (True, True, True)


Constraint = Annotated[FixAtomsConstraint | FixCartesianConstraint, Field(discriminator="type")]


class StructureError(ValueError):
    """A structure that cannot be represented or is physically malformed."""


class Structure(BaseModel):
    """Atoms on the wire: everything an ase.Atoms carries that a calculation depends on."""

    model_config = ConfigDict(extra="forbid")

    numbers: list[Int32] = Field(description="Atomic numbers, one per atom.")
    positions: list[Vec3] = Field(description="Cartesian positions in Angstrom.")
    cell: tuple[Vec3, Vec3, Vec3] = Field(
        default=((0.0, 0.0, 0.0), (0.0, 0.0, 0.0), (0.0, 0.0, 0.0)),
        description="Cell vectors as rows, Angstrom.",
    )
    pbc: Mask3 = (False, False, False)
    constraints: list[Constraint] = Field(default_factory=list)
    initial_charges: list[StrictFloat] | None = None
    initial_magmoms: list[StrictFloat] | None = None
    momenta: list[Vec3] | None = Field(
        default=None, description="Momenta in ASE units (amu*Angstrom/ASE time)."
    )
    tags: list[Int32] | None = None
    info: dict[str, JsonValue] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _check_consistent(self) -> Structure:
        n = len(self.numbers)
        if n == 0:
            raise ValueError("structure has no atoms; give at least one atom")
        if not 1 <= min(self.numbers) <= max(self.numbers) <= 118:
            z = next(z for z in self.numbers if not 1 <= z <= 118)
            raise ValueError(f"atomic number {z} is not an element (use 1 to 118)")
        per_atom: dict[str, list[Any] | None] = {
            "positions": self.positions,
            "initial_charges": self.initial_charges,
            "initial_magmoms": self.initial_magmoms,
            "momenta": self.momenta,
            "tags": self.tags,
        }
        for name, values in per_atom.items():
            if values is not None and len(values) != n:
                raise ValueError(f"{name} has {len(values)} entries but there are {n} atoms")
        # One pass in C over every number first (this runs on each structure of a
        # batch, on both sides); the slow search for the culprit only when one fails.
        if not all_finite(chain.from_iterable(self.positions)):
            i = next(i for i, xyz in enumerate(self.positions) if not all_finite(xyz))
            raise ValueError(f"position of atom {i} is not finite: {list(self.positions[i])}")
        if not all_finite(chain.from_iterable(self.cell)):
            raise ValueError("cell contains a value that is not finite")
        for name in ("initial_charges", "initial_magmoms"):
            values = getattr(self, name)
            if values is not None and not all_finite(values):
                raise ValueError(f"{name} contains a value that is not finite")
        if self.momenta is not None and not all_finite(chain.from_iterable(self.momenta)):
            raise ValueError("momenta contain a value that is not finite")
        _check_info_finite(self.info, "info")
        for c in self.constraints:
            bad = [i for i in c.indices if not 0 <= i < n]
            if bad:
                raise ValueError(f"{c.type} names atom index {bad[0]}, but there are {n} atoms")
        return self

    @property
    def natoms(self) -> int:
        return len(self.numbers)

    @classmethod
    def from_atoms(cls, atoms: Atoms) -> Structure:
        """Capture an ase.Atoms; raises StructureError for what cannot travel losslessly."""
        constraints: list[Constraint] = []
        n = len(atoms)
        for c in atoms.constraints:
            if not isinstance(c, FixAtoms | FixCartesian):
                raise StructureError(
                    f"constraint {type(c).__name__} cannot be sent; "
                    "supported are FixAtoms and FixCartesian"
                )
            # ASE accepts negative indices (counted from the end); send the atom they mean.
            indices = [int(i) % n if -n <= int(i) < 0 else int(i) for i in c.index]
            if isinstance(c, FixAtoms):
                constraints.append(FixAtomsConstraint(indices=indices))
            else:
                mask = tuple(bool(m) for m in c.mask)
                constraints.append(
                    FixCartesianConstraint(indices=indices, mask=(mask[0], mask[1], mask[2]))
                )
        info: dict[str, JsonValue] = {}
        for key, value in atoms.info.items():
            if not isinstance(key, str):
                raise StructureError(
                    f"atoms.info key {key!r} is not a string and would change on the wire; "
                    "use string keys"
                )
            info[key] = _json_safe(key, value)
        magmoms = atoms.get_initial_magnetic_moments()
        if magmoms.ndim != 1:
            raise StructureError("non-collinear magnetic moments are not supported yet")
        # numpy's tolist() gives Python floats and bools; the model makes the rows tuples.
        return cls(
            numbers=atoms.numbers.tolist(),
            positions=np.asarray(atoms.positions, dtype=float).tolist(),
            cell=np.asarray(atoms.cell.array, dtype=float).tolist(),
            pbc=np.asarray(atoms.pbc, dtype=bool).tolist(),
            constraints=constraints,
            initial_charges=_optional_array(atoms, "initial_charges"),
            initial_magmoms=_optional_array(atoms, "initial_magmoms"),
            momenta=np.asarray(atoms.arrays["momenta"], dtype=float).tolist()
            if "momenta" in atoms.arrays
            else None,
            tags=atoms.get_tags().tolist() if "tags" in atoms.arrays else None,
            info=info,
        )

    def to_atoms(self) -> Atoms:
        """Rebuild the ase.Atoms this structure was captured from."""
        atoms = Atoms(
            numbers=self.numbers,
            positions=np.array(self.positions, dtype=float).reshape(-1, 3),
            cell=np.array(self.cell, dtype=float),
            pbc=self.pbc,
        )
        if self.initial_charges is not None:
            atoms.set_initial_charges(self.initial_charges)
        if self.initial_magmoms is not None:
            atoms.set_initial_magnetic_moments(self.initial_magmoms)
        if self.momenta is not None:
            atoms.set_momenta(np.array(self.momenta, dtype=float), apply_constraint=False)
        if self.tags is not None:
            atoms.set_tags(self.tags)
        atoms.info.update(json.loads(json.dumps(self.info)))
        constraints: list[FixAtoms | FixCartesian] = []
        for c in self.constraints:
            if isinstance(c, FixAtomsConstraint):
                constraints.append(FixAtoms(indices=c.indices))
            else:
                constraints.append(FixCartesian(c.indices, mask=c.mask))
        if constraints:
            atoms.set_constraint(constraints)
        return atoms

    def chemical_formula(self) -> str:
        """The formula as ASE's "hill" mode writes it (carbon, then hydrogen, then the
        rest alphabetically; ASE puts hydrogen first even without carbon), counted here
        without building an Atoms: this runs for every structure of a batch."""
        counts = {chemical_symbols[z]: n for z, n in Counter(self.numbers).items()}
        first = [s for s in ("C", "H") if s in counts]
        order = first + sorted(s for s in counts if s not in first)
        return "".join(s if counts[s] == 1 else f"{s}{counts[s]}" for s in order)


def all_finite(values: Iterable[float]) -> bool:
    return all(map(math.isfinite, values))


def _check_info_finite(value: Any, where: str) -> None:
    """info travels as JSON, which has no NaN or infinity."""
    if isinstance(value, float) and not math.isfinite(value):
        raise ValueError(f"{where} is {value}; only finite numbers travel")
    if isinstance(value, list):
        for index, item in enumerate(value):
            _check_info_finite(item, f"{where}[{index}]")
    elif isinstance(value, dict):
        for key, item in value.items():
            _check_info_finite(item, f"{where}[{key!r}]")


def _optional_array(atoms: Atoms, name: str) -> list[float] | None:
    if name not in atoms.arrays:
        return None
    return [float(x) for x in atoms.arrays[name]]


def _json_safe(key: object, value: Any) -> JsonValue:
    """info travels as JSON. numpy arrays and scalars and tuples become lists and numbers
    (ASE itself stores arrays there, e.g. add_adsorbate's `adsorbate_info`); sets, objects,
    non-finite floats and non-string keys are refused, naming the info key to fix."""
    if isinstance(value, np.ndarray):
        value = value.tolist()
    elif isinstance(value, np.generic):
        value = value.item()
    if value is None or isinstance(value, bool | int | str):
        return value
    if isinstance(value, float):
        if not math.isfinite(value):
            raise StructureError(f"atoms.info[{key!r}] is {value}; only finite numbers travel")
        return value
    if isinstance(value, list | tuple):
        return [_json_safe(key, item) for item in value]
    if isinstance(value, dict):
        converted: dict[str, JsonValue] = {}
        for inner_key, inner in value.items():
            if not isinstance(inner_key, str):
                raise StructureError(
                    f"atoms.info[{key!r}] has the non-string key {inner_key!r}, which would "
                    "change on the wire; use string keys"
                )
            converted[inner_key] = _json_safe(key, inner)
        return converted
    raise StructureError(
        f"atoms.info[{key!r}] is not JSON-safe ({type(value).__name__}); "
        "convert it to numbers, strings, lists or dicts, or remove it"
    )
