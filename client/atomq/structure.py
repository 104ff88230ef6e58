"""The wire form of an atomic structure, and its lossless round trip with ase.Atoms.

Units are ASE's: positions and cell in Angstrom, momenta in ASE units
(amu * Angstrom / ASE time unit), masses in amu, charges in e, magnetic moments in Bohr
magnetons. Floats travel as JSON numbers; Python writes the shortest repr that reads back
to the same float64, so the round trip is exact.

What travels: numbers, positions, cell, pbc, momenta, masses (when set), charges,
magnetic moments, tags, info, every other per-atom array of float64, int64, int32, bool
or str (dtype and shape kept), and ASE's constraints FixAtoms, FixCartesian,
FixBondLengths, FixedPlane, FixedLine, FixCom and FixSubsetCom. Anything else is refused
by `Structure.from_atoms` with a StructureError that names it; nothing is dropped.
"""

from __future__ import annotations

import json
import math
import re
from collections import Counter
from collections.abc import Iterable
from itertools import chain
from typing import Annotated, Any, Literal

import numpy as np
from ase import Atoms
from ase.constraints import (
    FixAtoms,
    FixBondLengths,
    FixCartesian,
    FixCom,
    FixConstraint,
    FixedLine,
    FixedPlane,
    FixSubsetCom,
)
from ase.data import chemical_symbols
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    JsonValue,
    StrictBool,
    StrictFloat,
    StrictInt,
    StrictStr,
    model_validator,
)

# Strict scalars: a number field takes numbers only (not "2.5" or true), a flag booleans.
Vec3 = tuple[StrictFloat, StrictFloat, StrictFloat]
Mask3 = tuple[StrictBool, StrictBool, StrictBool]
Int32 = Annotated[StrictInt, Field(ge=-(2**31), lt=2**31)]
AtomIndex = Annotated[StrictInt, Field(ge=-(2**31), lt=2**31)]


class _AtomListConstraint(BaseModel):
    """A constraint on listed atoms; ASE refuses an atom listed twice."""

    model_config = ConfigDict(extra="forbid")
    type: str
    indices: list[AtomIndex]

    def check(self, natoms: int) -> None:
        _check_atom_indices(self.type, self.indices, natoms)
        seen: set[int] = set()
        for i in self.indices:
            if i in seen:
                raise ValueError(f"{self.type} lists atom {i} twice; list each atom once")
            seen.add(i)


class FixAtomsConstraint(_AtomListConstraint):
    """ASE's FixAtoms: the listed atoms do not move."""

    type: Literal["FixAtoms"] = "FixAtoms"

    def to_ase(self) -> FixAtoms:
        return FixAtoms(indices=self.indices)


class FixCartesianConstraint(_AtomListConstraint):
    """ASE's FixCartesian: the listed atoms keep the masked Cartesian components."""

    type: Literal["FixCartesian"] = "FixCartesian"
    mask: Mask3 = (True, True, True)

    def to_ase(self) -> FixCartesian:
        return FixCartesian(self.indices, mask=self.mask)


class _DirectionConstraint(_AtomListConstraint):
    direction: Vec3 = Field(description="The unit vector ASE keeps (it normalises its input).")

    def check(self, natoms: int) -> None:
        super().check(natoms)
        if not all_finite(self.direction) or not any(self.direction):
            raise ValueError(
                f"{self.type} direction {list(self.direction)} is not a direction; "
                "give a finite, non-zero vector"
            )

    def _restore_direction(self, constraint: FixedPlane | FixedLine) -> None:
        # ASE divided the user's vector by its norm, and from_atoms sends that unit
        # vector; dividing it by its norm again could move its last bit, so it is put
        # back as sent. A vector of any other length (written by hand) keeps ASE's own
        # normalisation.
        direction = np.array(self.direction, dtype=float)
        if abs(float(np.linalg.norm(direction)) - 1.0) < 1e-12:
            constraint.dir = direction


class FixedPlaneConstraint(_DirectionConstraint):
    """ASE's FixedPlane: the listed atoms move only in the plane normal to `direction`."""

    type: Literal["FixedPlane"] = "FixedPlane"

    def to_ase(self) -> FixedPlane:
        constraint = FixedPlane(self.indices, self.direction)
        self._restore_direction(constraint)
        return constraint


class FixedLineConstraint(_DirectionConstraint):
    """ASE's FixedLine: the listed atoms move only along `direction`."""

    type: Literal["FixedLine"] = "FixedLine"

    def to_ase(self) -> FixedLine:
        constraint = FixedLine(self.indices, self.direction)
        self._restore_direction(constraint)
        return constraint


class FixSubsetComConstraint(_AtomListConstraint):
    """ASE's FixSubsetCom: the centre of mass of the listed atoms does not move."""

    type: Literal["FixSubsetCom"] = "FixSubsetCom"

    def to_ase(self) -> FixSubsetCom:
        return FixSubsetCom(self.indices)


class FixComConstraint(BaseModel):
    """ASE's FixCom: the centre of mass of all atoms does not move."""

    model_config = ConfigDict(extra="forbid")
    type: Literal["FixCom"] = "FixCom"

    def check(self, natoms: int) -> None:
        """Nothing to check: it names no atoms."""

    def to_ase(self) -> FixCom:
        return FixCom()


class FixBondLengthsConstraint(BaseModel):
    """ASE's FixBondLengths (and FixBondLength, one pair): each pair keeps its distance."""

    model_config = ConfigDict(extra="forbid")
    type: Literal["FixBondLengths"] = "FixBondLengths"
    pairs: list[tuple[AtomIndex, AtomIndex]]
    tolerance: StrictFloat = Field(default=1e-13, description="ASE's convergence tolerance.")
    bondlengths: list[StrictFloat] | None = Field(
        default=None,
        description="Target distances in Angstrom, one per pair; None: ASE takes the "
        "distances of the structure the constraint first acts on.",
    )

    def check(self, natoms: int) -> None:
        _check_atom_indices(self.type, [i for pair in self.pairs for i in pair], natoms)
        for a, b in self.pairs:
            if a == b:
                raise ValueError(f"FixBondLengths pair ({a}, {b}) names one atom twice")
        if not math.isfinite(self.tolerance) or self.tolerance < 0:
            raise ValueError(
                f"FixBondLengths tolerance {self.tolerance} must be a finite number >= 0"
            )
        if self.bondlengths is not None:
            if len(self.bondlengths) != len(self.pairs):
                raise ValueError(
                    f"FixBondLengths has {len(self.bondlengths)} bond lengths for "
                    f"{len(self.pairs)} pairs; give one per pair"
                )
            if not all(math.isfinite(d) and d > 0 for d in self.bondlengths):
                raise ValueError("FixBondLengths bond lengths must be finite and positive")

    def to_ase(self) -> FixBondLengths:
        bondlengths = None
        if self.bondlengths is not None:
            bondlengths = np.array(self.bondlengths, dtype=float)
        pairs = np.array(self.pairs, dtype=int).reshape(-1, 2)
        return FixBondLengths(pairs, tolerance=self.tolerance, bondlengths=bondlengths)


Constraint = Annotated[
    FixAtomsConstraint
    | FixCartesianConstraint
    | FixBondLengthsConstraint
    | FixedPlaneConstraint
    | FixedLineConstraint
    | FixComConstraint
    | FixSubsetComConstraint,
    Field(discriminator="type"),
]

SUPPORTED_CONSTRAINTS = (
    "FixAtoms, FixCartesian, FixBondLengths (FixBondLength), FixedPlane, FixedLine, "
    "FixCom and FixSubsetCom"
)


# -- per-atom arrays beyond the named fields: dtype, shape and values kept ------------
# Values travel flattened in C order; `shape` is the array's full shape, atoms first.
# One value or one row of values per atom: that is what ASE's extended XYZ, the format
# of the workers' trajectories, can write, so nothing reaches a worker that its
# trajectory writer would fail on.
Dimension = Annotated[StrictInt, Field(ge=0, lt=2**31)]
INT_RANGES = {"int64": (-(2**63), 2**63), "int32": (-(2**31), 2**31)}


class Float64Array(BaseModel):
    """A float64 per-atom array (finite values only: JSON has no NaN or infinity)."""

    model_config = ConfigDict(extra="forbid")
    dtype: Literal["float64"] = "float64"
    shape: list[Dimension]
    values: list[StrictFloat]

    def problem(self) -> str | None:
        if all_finite(self.values):
            return None
        i = next(i for i, x in enumerate(self.values) if not math.isfinite(x))
        atom = i // _row_length(self.shape)
        return f"is {self.values[i]} at atom {atom}; only finite numbers travel"

    def to_numpy(self) -> np.ndarray:
        return np.array(self.values, dtype=np.float64).reshape(self.shape)


class IntegerArray(BaseModel):
    """An int64 or int32 per-atom array."""

    model_config = ConfigDict(extra="forbid")
    dtype: Literal["int64", "int32"]
    shape: list[Dimension]
    values: list[StrictInt]

    def problem(self) -> str | None:
        low, high = INT_RANGES[self.dtype]
        if all(low <= v < high for v in self.values):
            return None
        v = next(v for v in self.values if not low <= v < high)
        return f"holds {v}, which does not fit {self.dtype}"

    def to_numpy(self) -> np.ndarray:
        return np.array(self.values, dtype=self.dtype).reshape(self.shape)


class BoolArray(BaseModel):
    """A bool per-atom array."""

    model_config = ConfigDict(extra="forbid")
    dtype: Literal["bool"] = "bool"
    shape: list[Dimension]
    values: list[StrictBool]

    def problem(self) -> str | None:
        return None

    def to_numpy(self) -> np.ndarray:
        return np.array(self.values, dtype=bool).reshape(self.shape)


class TextArray(BaseModel):
    """A str per-atom array of numpy's fixed width (dtype '<U{width}')."""

    model_config = ConfigDict(extra="forbid")
    dtype: Literal["str"] = "str"
    width: Dimension = Field(description="numpy's fixed width, in characters.")
    shape: list[Dimension]
    values: list[StrictStr]

    def problem(self) -> str | None:
        for v in self.values:
            if len(v) > self.width:
                return f"holds {v!r}, longer than its width {self.width}"
            if v.endswith("\x00"):
                # numpy strips trailing NUL characters, so such a value would change.
                return f"holds {v!r}, which ends in a NUL character numpy would strip"
        return None

    def to_numpy(self) -> np.ndarray:
        return np.array(self.values, dtype=f"<U{self.width}").reshape(self.shape)


WireArray = Float64Array | IntegerArray | BoolArray | TextArray
PerAtomArray = Annotated[WireArray, Field(discriminator="dtype")]

# atoms.arrays entries that travel in fields of their own.
OWN_FIELDS = frozenset(
    {"numbers", "positions", "momenta", "masses", "initial_charges", "initial_magmoms", "tags"}
)
# A name goes into the extended-XYZ header of the workers' trajectories, which takes plain
# names; "symbols" is the column ASE itself writes there.
ARRAY_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def _row_length(shape: list[int]) -> int:
    return math.prod(shape[1:]) or 1


def _array_problem(name: str, array: WireArray, natoms: int) -> str | None:
    """What keeps a per-atom array from travelling, or None."""
    if name in OWN_FIELDS:
        return f"per-atom array {name!r} travels in the structure's field {name!r}, not here"
    if name == "symbols":
        return "per-atom array 'symbols' is ASE's own name for the elements; rename it"
    if not ARRAY_NAME.fullmatch(name):
        return (
            f"per-atom array name {name!r} is not a plain name; use letters, digits and "
            "underscores (not starting with a digit)"
        )
    shape = tuple(array.shape)
    if not 1 <= len(shape) <= 2 or (len(shape) == 2 and shape[1] == 0):
        return (
            f"per-atom array {name!r} has shape {shape}; arrays travel as one value or one "
            "row of values per atom: reshape it to (natoms,) or (natoms, k) with k >= 1"
        )
    if shape[0] != natoms:
        return (
            f"per-atom array {name!r} has shape {shape} but there are {natoms} atoms; "
            "give one value (or row) per atom"
        )
    if math.prod(shape) != len(array.values):
        return f"per-atom array {name!r} has shape {shape} but {len(array.values)} values"
    problem = array.problem()
    return None if problem is None else f"per-atom array {name!r} {problem}"


def _mass_problem(masses: list[float], numbers: list[int]) -> str | None:
    """A mass that is not a finite positive number, named with its atom, or None."""
    if all(math.isfinite(m) and m > 0 for m in masses):
        return None
    i = next(i for i, m in enumerate(masses) if not (math.isfinite(m) and m > 0))
    return (
        f"mass of atom {i} ({chemical_symbols[numbers[i]]}) is {masses[i]}; "
        "masses must be finite and positive, in amu"
    )


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
    masses: list[StrictFloat] | None = Field(
        default=None,
        description="Masses in amu, one per atom (isotopes); None: ASE's standard atomic weights.",
    )
    tags: list[Int32] | None = None
    arrays: dict[str, PerAtomArray] = Field(
        default_factory=dict,
        description="Every other per-atom array of the Atoms, by name, dtype and shape kept.",
    )
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
            "masses": self.masses,
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
        if self.masses is not None and (problem := _mass_problem(self.masses, self.numbers)):
            raise ValueError(problem)
        for name, array in self.arrays.items():
            if problem := _array_problem(name, array, n):
                raise ValueError(problem)
        _check_info_finite(self.info, "info")
        for c in self.constraints:
            c.check(n)
        return self

    @property
    def natoms(self) -> int:
        return len(self.numbers)

    @classmethod
    def from_atoms(cls, atoms: Atoms) -> Structure:
        """Capture an ase.Atoms; raises StructureError for what cannot travel losslessly."""
        n = len(atoms)
        constraints = [_constraint_from_ase(c, n) for c in atoms.constraints]
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
        masses = None
        if "masses" in atoms.arrays:
            masses = np.asarray(atoms.arrays["masses"], dtype=float).reshape(-1).tolist()
            if problem := _mass_problem(masses, atoms.numbers.tolist()):
                raise StructureError(f"{problem}; fix them with atoms.set_masses(...)")
        arrays = {
            name: _array_from_ase(name, value, n)
            for name, value in atoms.arrays.items()
            if name not in OWN_FIELDS
        }
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
            masses=masses,
            tags=atoms.get_tags().tolist() if "tags" in atoms.arrays else None,
            arrays=arrays,
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
        if self.masses is not None:
            atoms.set_masses(np.array(self.masses, dtype=float))
        if self.tags is not None:
            atoms.set_tags(self.tags)
        for name, array in self.arrays.items():
            atoms.new_array(name, array.to_numpy())
        atoms.info.update(json.loads(json.dumps(self.info)))
        if self.constraints:
            atoms.set_constraint([c.to_ase() for c in self.constraints])
        return atoms

    def chemical_formula(self) -> str:
        """The formula as ASE's "hill" mode writes it (carbon, then hydrogen, then the
        rest alphabetically; ASE puts hydrogen first even without carbon), counted here
        without building an Atoms: this runs for every structure of a batch."""
        counts = {chemical_symbols[z]: n for z, n in Counter(self.numbers).items()}
        first = [s for s in ("C", "H") if s in counts]
        order = first + sorted(s for s in counts if s not in first)
        return "".join(s if counts[s] == 1 else f"{s}{counts[s]}" for s in order)


def _check_atom_indices(kind: str, indices: list[int], natoms: int) -> None:
    bad = [i for i in indices if not 0 <= i < natoms]
    if bad:
        raise ValueError(f"{kind} names atom index {bad[0]}, but there are {natoms} atoms")


def _atom_index(index: Any, natoms: int) -> int:
    """ASE accepts negative indices (counted from the end); send the atom they mean."""
    i = int(index)
    return i % natoms if -natoms <= i < 0 else i


def _constraint_from_ase(c: FixConstraint, natoms: int) -> Constraint:
    # Exact types: a subclass may act differently from the constraint it derives from
    # (FixSubsetCom derives from FixCom).
    if type(c) is FixAtoms:
        return FixAtomsConstraint(indices=_atom_indices(c.index, natoms))
    if type(c) is FixCartesian:
        x, y, z = (bool(m) for m in c.mask)
        return FixCartesianConstraint(indices=_atom_indices(c.index, natoms), mask=(x, y, z))
    if type(c) is FixedPlane:
        return FixedPlaneConstraint(indices=_atom_indices(c.index, natoms), direction=_vec3(c.dir))
    if type(c) is FixedLine:
        return FixedLineConstraint(indices=_atom_indices(c.index, natoms), direction=_vec3(c.dir))
    if type(c) is FixSubsetCom:
        return FixSubsetComConstraint(indices=_atom_indices(c.get_indices(), natoms))
    if type(c) is FixCom:
        return FixComConstraint()
    if type(c) is FixBondLengths:
        pairs = np.asarray(c.pairs)
        if pairs.size and (pairs.ndim != 2 or pairs.shape[1] != 2 or pairs.dtype.kind not in "iu"):
            raise StructureError(
                f"FixBondLengths pairs {pairs.tolist()} are not pairs of atom indices; "
                "give them as [(i, j), ...]"
            )
        bondlengths = None
        if c.bondlengths is not None:
            bondlengths = [float(d) for d in np.ravel(c.bondlengths)]
        return FixBondLengthsConstraint(
            pairs=[
                (_atom_index(a, natoms), _atom_index(b, natoms)) for a, b in pairs.reshape(-1, 2)
            ],
            tolerance=float(c.tolerance),
            bondlengths=bondlengths,
        )
    raise StructureError(
        f"constraint {type(c).__name__} cannot be sent; supported are {SUPPORTED_CONSTRAINTS}; "
        "remove it (atoms.set_constraint()) or express it with one of those"
    )


def _atom_indices(indices: Iterable[Any], natoms: int) -> list[int]:
    return [_atom_index(i, natoms) for i in indices]


def _vec3(values: Iterable[Any]) -> tuple[float, float, float]:
    x, y, z = (float(v) for v in values)
    return x, y, z


def _array_from_ase(name: object, value: np.ndarray, natoms: int) -> WireArray:
    """One extra entry of atoms.arrays in its wire form; StructureError for what cannot
    travel, naming the array and how to fix it."""
    if not isinstance(name, str):
        raise StructureError(f"atoms.arrays key {name!r} is not a string; use string names")
    where = f"atoms.arrays[{name!r}]"
    array = np.asarray(value)
    shape, dtype = list(array.shape), array.dtype
    flat = array.reshape(-1)
    wire: WireArray
    if dtype == np.float64:
        if not np.isfinite(flat).all():
            atom = int(np.argmin(np.isfinite(flat))) // _row_length(shape)
            raise StructureError(
                f"{where} has a value that is not finite at atom {atom}; only finite numbers "
                "travel: replace NaN or infinity (or remove the array)"
            )
        wire = Float64Array(shape=shape, values=flat.tolist())
    elif dtype in (np.int64, np.int32):
        wire = IntegerArray(
            dtype="int64" if dtype == np.int64 else "int32", shape=shape, values=flat.tolist()
        )
    elif dtype == np.bool_:
        wire = BoolArray(shape=shape, values=flat.tolist())
    elif dtype.kind == "U":
        wire = TextArray(width=dtype.itemsize // 4, shape=shape, values=flat.tolist())
    elif dtype.kind == "c":
        raise StructureError(
            f"{where} holds complex numbers, which cannot travel; store the real and "
            "imaginary parts as two float64 arrays"
        )
    elif dtype.kind == "O":
        raise StructureError(
            f"{where} holds Python objects, which cannot travel; convert it with "
            ".astype(float), .astype(int), .astype(bool) or .astype(str)"
        )
    else:
        raise StructureError(
            f"{where} has dtype {dtype}; arrays of float64, int64, int32, bool and str "
            f"travel: convert it, e.g. atoms.arrays[{name!r}] = "
            f"atoms.arrays[{name!r}].astype(np.float64)"
        )
    if problem := _array_problem(name, wire, natoms):
        raise StructureError(f"{where}: {problem}")
    return wire


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
