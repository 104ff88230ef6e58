"""The Structure contract: ase.Atoms -> JSON -> ase.Atoms is lossless, and what cannot
travel (or is malformed) is refused with a message that names the problem."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from ase import Atoms
from ase.build import add_adsorbate, fcc100, molecule
from ase.constraints import (
    FixAtoms,
    FixBondLength,
    FixBondLengths,
    FixCartesian,
    FixCom,
    FixConstraint,
    FixedLine,
    FixedPlane,
    FixInternals,
    FixScaled,
    FixSubsetCom,
    Hookean,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from atomq.structure import OWN_FIELDS, Structure, StructureError

# Values that trip up float printing and parsing: signed zero, the smallest subnormal,
# the smallest normal, the largest finite double, a value near the subnormal range, and
# decimals that only survive with all 17 significant digits.
AWKWARD_FLOATS = [
    0.0,
    -0.0,
    1e-300,
    -1e-300,
    5e-324,
    2.2250738585072014e-308,
    1.7976931348623157e308,
    -1.7976931348623157e308,
    123456.789012345,
    0.1,
    1 / 3,
    2.0**53 + 2,
]

finite_floats = st.one_of(
    st.sampled_from(AWKWARD_FLOATS), st.floats(allow_nan=False, allow_infinity=False)
)
vec3 = st.tuples(finite_floats, finite_floats, finite_floats)
mask3 = st.tuples(st.booleans(), st.booleans(), st.booleans())

# JSON-safe info: string keys; values JSON numbers (any size of int), strings, bools,
# null, and nested lists and string-keyed dicts of those.
json_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**70), max_value=2**70),
    finite_floats,
    st.text(max_size=12),
)
json_values = st.recursive(
    json_scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=12,
)
info_dicts = st.dictionaries(st.text(max_size=10), json_values, max_size=5)

# Masses: any positive finite float64, the smallest subnormal and the largest double too.
positive_floats = st.one_of(
    st.sampled_from([5e-324, 2.2250738585072014e-308, 1e-300, 1.7976931348623157e308, 2.014]),
    st.floats(min_value=5e-324, allow_nan=False, allow_infinity=False),
)
array_names = st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,8}", fullmatch=True).filter(
    lambda name: name not in OWN_FIELDS and name != "symbols"
)
# numpy strips trailing NUL characters from its fixed-width strings, so none are drawn.
array_text = st.text(st.characters(blacklist_characters="\x00"), max_size=6)


@st.composite
def per_atom_array(draw: st.DrawFn, natoms: int) -> np.ndarray:
    """A float64, int64, int32, bool or str array of shape (natoms,) or (natoms, k)."""
    shape = (natoms,) if draw(st.booleans()) else (natoms, draw(st.integers(1, 4)))
    dtype, elements = draw(
        st.sampled_from(
            [
                (np.dtype(np.float64), finite_floats),
                (np.dtype(np.int64), st.integers(-(2**63), 2**63 - 1)),
                (np.dtype(np.int32), st.integers(-(2**31), 2**31 - 1)),
                (np.dtype(bool), st.booleans()),
                (np.dtype("<U6"), array_text),
            ]
        )
    )
    return draw(hnp.arrays(dtype, shape, elements=elements))


# Directions away from overflow and underflow of ASE's own normalisation.
direction_component = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False)
directions = st.tuples(direction_component, direction_component, direction_component).filter(
    lambda v: float(np.linalg.norm(v)) > 1e-3
)


@st.composite
def random_atoms(draw: st.DrawFn) -> Atoms:
    n = draw(st.integers(min_value=1, max_value=20))
    numbers = draw(st.lists(st.integers(1, 118), min_size=n, max_size=n))
    positions = draw(st.lists(vec3, min_size=n, max_size=n))
    if draw(st.booleans()):
        cell: list[tuple[float, float, float]] = [(0.0, 0.0, 0.0)] * 3
        pbc: tuple[bool, bool, bool] = (False, False, False)
    else:
        cell = draw(st.lists(vec3, min_size=3, max_size=3))
        pbc = draw(mask3)
    atoms = Atoms(numbers=numbers, positions=positions, cell=cell, pbc=pbc)

    per_atom_floats = st.lists(finite_floats, min_size=n, max_size=n)
    if draw(st.booleans()):
        atoms.set_initial_charges(draw(per_atom_floats))
    if draw(st.booleans()):
        atoms.set_initial_magnetic_moments(draw(per_atom_floats))
    if draw(st.booleans()):
        atoms.set_momenta(np.array(draw(st.lists(vec3, min_size=n, max_size=n)), dtype=float))
    if draw(st.booleans()):
        atoms.set_tags(draw(st.lists(st.integers(-(2**31), 2**31 - 1), min_size=n, max_size=n)))

    if draw(st.booleans()):
        atoms.set_masses(draw(st.lists(positive_floats, min_size=n, max_size=n)))
    for name in draw(st.lists(array_names, max_size=3, unique=True)):
        atoms.new_array(name, draw(per_atom_array(n)))

    def some_atoms() -> list[int]:
        selected = draw(st.lists(st.booleans(), min_size=n, max_size=n))
        return [i for i, chosen in enumerate(selected) if chosen]

    constraints: list[FixConstraint] = []
    if draw(st.booleans()):
        constraints.append(FixAtoms(mask=draw(st.lists(st.booleans(), min_size=n, max_size=n))))
    if draw(st.booleans()):
        constraints.append(FixCartesian(some_atoms(), mask=draw(mask3)))
    if draw(st.booleans()):
        constraints.append(FixedPlane(some_atoms(), draw(directions)))
    if draw(st.booleans()):
        constraints.append(FixedLine(some_atoms(), draw(directions)))
    if draw(st.booleans()):
        constraints.append(FixCom())
    if draw(st.booleans()):
        constraints.append(FixSubsetCom(some_atoms()))
    if n >= 2 and draw(st.booleans()):
        pair = st.lists(st.integers(0, n - 1), min_size=2, max_size=2, unique=True)
        pairs = draw(st.lists(pair, min_size=1, max_size=3))
        bondlengths = draw(
            st.none() | st.lists(positive_floats, min_size=len(pairs), max_size=len(pairs))
        )
        tolerance = draw(st.sampled_from([1e-13, 1e-8, 0.0]))
        constraints.append(FixBondLengths(pairs, tolerance=tolerance, bondlengths=bondlengths))
    if constraints:
        atoms.set_constraint(constraints)
    atoms.info = draw(info_dicts)
    return atoms


def assert_bitwise_equal(name: str, before: np.ndarray, after: np.ndarray) -> None:
    assert before.dtype == after.dtype, f"{name}: dtype {before.dtype} -> {after.dtype}"
    assert before.shape == after.shape, f"{name}: shape {before.shape} -> {after.shape}"
    assert np.array_equal(before, after), f"{name} changed"
    if before.dtype.kind == "f":
        # array_equal treats -0.0 == 0.0; the sign bits and raw bytes must match too.
        assert np.array_equal(np.signbit(before), np.signbit(after)), f"{name}: sign of zero lost"
        assert before.astype(np.float64).tobytes() == after.astype(np.float64).tobytes(), name


@settings(
    max_examples=300,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(random_atoms(), st.booleans())
def test_atoms_survive_the_wire_bit_for_bit(atoms: Atoms, as_text: bool) -> None:
    structure = Structure.from_atoms(atoms)
    if as_text:  # what the client sends and the service reads
        back = Structure.model_validate_json(structure.model_dump_json()).to_atoms()
    else:  # what the service stores (a JSON column) and the worker reads back
        back = Structure.model_validate(structure.model_dump(mode="json")).to_atoms()

    assert_bitwise_equal("numbers", atoms.numbers, back.numbers)
    assert_bitwise_equal("pbc", atoms.pbc, back.pbc)
    assert_bitwise_equal("cell", atoms.cell.array, back.cell.array)
    # Every per-atom array (positions, charges, magmoms, momenta, tags, masses and the
    # extra ones, whatever their dtype and shape) and no others.
    assert set(back.arrays) == set(atoms.arrays)
    for name, before in atoms.arrays.items():
        assert_bitwise_equal(name, before, back.arrays[name])
    assert_bitwise_equal("get_masses()", atoms.get_masses(), back.get_masses())

    assert len(back.constraints) == len(atoms.constraints)
    for before, after in zip(atoms.constraints, back.constraints, strict=True):
        assert type(after) is type(before)
        # ASE's own description of each constraint (indices, masks, directions, pairs).
        assert after.todict() == before.todict()
        if isinstance(before, FixedPlane | FixedLine):
            assert_bitwise_equal("direction", before.dir, after.dir)
        if isinstance(before, FixBondLengths):
            assert after.tolerance == before.tolerance
            if before.bondlengths is None:
                assert after.bondlengths is None
            else:
                assert_bitwise_equal(
                    "bondlengths", np.asarray(before.bondlengths), after.bondlengths
                )

    assert back.info == atoms.info
    # == calls 1 == 1.0 == True and 0.0 == -0.0 equal; the JSON text tells them apart.
    assert json.dumps(back.info) == json.dumps(atoms.info)


def test_awkward_floats_keep_their_exact_bits() -> None:
    """A fixed case, so the edge values are covered even if hypothesis never draws them."""
    positions = np.array(AWKWARD_FLOATS, dtype=float).reshape(-1, 3)
    atoms = Atoms(numbers=[1] * len(positions), positions=positions)
    back = Structure.model_validate_json(Structure.from_atoms(atoms).model_dump_json()).to_atoms()
    assert back.positions.tobytes() == positions.tobytes()
    assert np.signbit(back.positions[0, 1])  # -0.0 keeps its sign


# -- what cannot travel: StructureError naming the offending item --------------------
@pytest.mark.parametrize(
    ("value", "type_name"),
    [
        ({1, 2}, "set"),
        (math.nan, "nan"),
        ([1.0, math.inf], "inf"),
        ({"nested": {1: "int key"}}, "would change on the wire"),
        (object(), "object"),
    ],
)
def test_info_that_is_not_json_safe_is_refused_by_key(value: Any, type_name: str) -> None:
    atoms = Atoms("Cu", info={"bad_entry": value, "fine": 1})
    with pytest.raises(StructureError, match=r"atoms\.info\['bad_entry'\]") as caught:
        Structure.from_atoms(atoms)
    assert type_name in str(caught.value)


def test_numpy_arrays_and_tuples_in_info_travel_as_lists() -> None:
    # ASE's add_adsorbate stores numpy arrays in atoms.info["adsorbate_info"].
    slab = fcc100("Al", size=(2, 2, 2))
    add_adsorbate(slab, "Au", 1.7, "hollow")
    atoms = Atoms("Cu", info={"grid": np.arange(3), "pair": (1, 2), "x": np.float64(0.5)})
    back = Structure.model_validate_json(Structure.from_atoms(atoms).model_dump_json()).to_atoms()
    assert back.info == {"grid": [0, 1, 2], "pair": [1, 2], "x": 0.5}
    sent = Structure.from_atoms(slab).to_atoms()
    expected = slab.info["adsorbate_info"]["cell"].tolist()
    assert sent.info["adsorbate_info"]["cell"] == expected


def test_non_string_top_level_info_key_is_refused() -> None:
    atoms = Atoms("Cu", info={1: "a"})
    with pytest.raises(StructureError, match="1"):
        Structure.from_atoms(atoms)


@pytest.mark.parametrize(
    "constraint",
    [
        Hookean(0, 1, 5.0, rt=1.2),
        FixScaled(0, mask=(True, False, False)),
        FixInternals(bonds=[(1.0, (0, 1))]),
    ],
    ids=["Hookean", "FixScaled", "FixInternals"],
)
def test_a_constraint_that_cannot_travel_is_refused_by_name(constraint: FixConstraint) -> None:
    atoms = molecule("H2O")
    atoms.set_constraint(constraint)
    with pytest.raises(StructureError) as caught:
        Structure.from_atoms(atoms)
    message = str(caught.value)
    assert type(constraint).__name__ in message and "FixBondLengths" in message


def test_each_constraint_acts_as_ase_applies_it() -> None:
    """Reference: ASE itself. The same displacement through the original constraints and
    through the ones rebuilt from the wire moves every atom to the same bits."""
    atoms = molecule("CH3CH2OH")
    atoms.center(vacuum=4.0)
    atoms.set_constraint(
        [
            FixBondLength(0, 1),
            FixedPlane([2, 3], (0.0, 0.0, 1.0)),
            FixedLine([4], (1.0, 1.0, 0.0)),
            FixCartesian([5], mask=(True, False, True)),
            FixAtoms(indices=[6]),
        ]
    )
    back = Structure.model_validate_json(Structure.from_atoms(atoms).model_dump_json()).to_atoms()
    rng = np.random.default_rng(3)
    step = atoms.positions + rng.normal(scale=0.05, size=atoms.positions.shape)
    moved, moved_back = atoms.copy(), back.copy()
    moved.set_positions(step)  # apply_constraint=True: ASE adjusts the step
    moved_back.set_positions(step)
    assert moved.positions.tobytes() == moved_back.positions.tobytes()
    forces = rng.normal(size=atoms.positions.shape)
    for original, rebuilt in zip(atoms.constraints, back.constraints, strict=True):
        a, b = forces.copy(), forces.copy()
        original.adjust_forces(atoms, a)
        rebuilt.adjust_forces(back, b)
        assert a.tobytes() == b.tobytes(), type(original).__name__


def test_fix_com_keeps_the_centre_of_mass_with_custom_masses() -> None:
    """FixCom weighs by the masses: with deuterium masses sent along, the rebuilt atoms
    keep the same centre of mass as ASE does on the original."""
    atoms = molecule("H2O")
    atoms.set_masses([15.999, 2.014, 2.014])
    atoms.set_constraint(FixCom())
    back = Structure.from_atoms(atoms).to_atoms()
    step = atoms.positions + np.array([[0.1, 0.0, 0.0], [0.0, 0.2, 0.0], [0.0, 0.0, 0.3]])
    atoms.set_positions(step)
    back.set_positions(step)
    assert atoms.positions.tobytes() == back.positions.tobytes()


@pytest.mark.parametrize(
    ("value", "fragment"),
    [
        (np.array([1 + 2j, 0j, 1j]), "complex numbers"),
        (np.array([object(), object(), object()], dtype=object), "Python objects"),
        (np.array([0.0, math.nan, 1.0]), "not finite at atom 1"),
        (np.zeros((3, 2, 2)), "one value or one row of values per atom"),
        (np.array([1, 2, 3], dtype=np.uint8), "dtype uint8"),
    ],
)
def test_an_array_that_cannot_travel_is_refused_by_name(value: np.ndarray, fragment: str) -> None:
    atoms = molecule("H2O")
    atoms.arrays["site_label"] = value
    with pytest.raises(StructureError, match=r"atoms\.arrays\['site_label'\]") as caught:
        Structure.from_atoms(atoms)
    assert fragment in str(caught.value)


def test_bad_masses_are_refused_naming_the_atom() -> None:
    atoms = molecule("H2O")
    atoms.set_masses([15.999, 0.0, 1.008])
    with pytest.raises(StructureError, match=r"mass of atom 1 \(H\) is 0.0"):
        Structure.from_atoms(atoms)
    with pytest.raises(ValidationError, match="mass of atom 0"):
        Structure.model_validate({"numbers": [1], "positions": [[0.0, 0.0, 0.0]], "masses": [-1.0]})


def test_negative_constraint_index_travels_as_the_atom_ase_means() -> None:
    atoms = Atoms("Cu3", positions=[(0, 0, 0), (2.5, 0, 0), (5, 0, 0)])
    atoms.set_constraint(FixAtoms(indices=[-1]))
    back = Structure.from_atoms(atoms).to_atoms()
    assert np.arange(3)[back.constraints[0].index].tolist() == [2]


# -- each new constraint, one at a time: positions, forces and momenta as ASE adjusts them
# The mass of deuterium, 2.014 u: the 2H atomic mass is 2.01410177812 u (AME2020 atomic
# mass evaluation; recalled from memory), against ASE's 1.008 for hydrogen (the IUPAC
# standard atomic weight, ase.data.atomic_masses).
DEUTERIUM_AMU = 2.014


def heavy_water() -> Atoms:
    """D2O in a periodic 8 Angstrom box: the deuterium masses make the mass-weighted
    constraints (FixBondLengths, FixCom, FixSubsetCom) depend on the masses too."""
    atoms = molecule("H2O")
    atoms.center(vacuum=4.0)
    atoms.pbc = True
    masses = atoms.get_masses()
    masses[atoms.numbers == 1] = DEUTERIUM_AMU
    atoms.set_masses(masses)
    return atoms


def over_the_wire(atoms: Atoms) -> Atoms:
    return Structure.model_validate_json(Structure.from_atoms(atoms).model_dump_json()).to_atoms()


def random_step(atoms: Atoms, seed: int) -> list[np.ndarray]:
    """New positions, forces and momenta, as an integrator hands them to a constraint."""
    rng = np.random.default_rng(seed)
    shape = atoms.positions.shape
    return [
        atoms.positions + rng.normal(scale=0.05, size=shape),
        rng.normal(size=shape),
        rng.normal(size=shape),
    ]


def adjusted(atoms: Atoms, seed: int = 7) -> list[np.ndarray]:
    """The random step after every constraint of the atoms has adjusted it."""
    positions, forces, momenta = random_step(atoms, seed)
    for constraint in atoms.constraints:
        constraint.adjust_positions(atoms, positions)
        constraint.adjust_forces(atoms, forces)
        constraint.adjust_momenta(atoms, momenta)
    return [positions, forces, momenta]


NEW_CONSTRAINTS = {
    "FixBondLength": lambda: FixBondLength(0, 1),
    "FixBondLengths": lambda: FixBondLengths([(0, 1), (0, -1)], tolerance=1e-10),
    "FixBondLengths-targets": lambda: FixBondLengths([(1, 2)], bondlengths=[1.4]),
    "FixedPlane": lambda: FixedPlane([0, 2], [1.0, 2.0, 3.0]),
    "FixedLine": lambda: FixedLine(1, [0.0, 1.0, 1.0]),
    "FixCom": FixCom,
    "FixSubsetCom": lambda: FixSubsetCom([1, 2]),
}


@pytest.mark.parametrize("make", NEW_CONSTRAINTS.values(), ids=NEW_CONSTRAINTS.keys())
def test_a_new_constraint_adjusts_as_ases_own(make: Any) -> None:
    # Reference: ASE's original constraint object acting on the original atoms.
    original = heavy_water()
    original.set_constraint(make())
    rebuilt = over_the_wire(original)
    assert type(rebuilt.constraints[0]) is type(original.constraints[0])
    expected, got = adjusted(original), adjusted(rebuilt)
    for name, before, after in zip(("positions", "forces", "momenta"), expected, got, strict=True):
        assert before.tobytes() == after.tobytes(), name
    # The constraint did change the step, so a constraint lost on the way would show.
    raw = random_step(original, 7)
    assert any(a.tobytes() != b.tobytes() for a, b in zip(expected, raw, strict=True))


@pytest.mark.parametrize(
    "make", [FixCom, lambda: FixSubsetCom([0, 1]), lambda: FixBondLength(0, 1)]
)
def test_mass_weighted_constraints_act_with_the_masses_that_travelled(make: Any) -> None:
    # With ASE's default hydrogen mass the same constraint moves the atoms differently,
    # so masses dropped on the way would show here.
    original = heavy_water()
    original.set_constraint(make())
    rebuilt = over_the_wire(original)
    default_masses = rebuilt.copy()
    default_masses.set_masses()  # ASE's standard atomic weights
    assert adjusted(rebuilt)[0].tobytes() == adjusted(original)[0].tobytes()
    assert adjusted(default_masses)[0].tobytes() != adjusted(original)[0].tobytes()


def test_fix_bond_lengths_keeps_its_targets_once_it_has_acted() -> None:
    # ASE fills in bondlengths the first time the constraint acts (an MD run's first
    # step); a final structure sent back after that keeps those targets, not the
    # distances of wherever the atoms stand when it is rebuilt.
    original = heavy_water()
    original.set_constraint(FixBondLengths([(0, 1), (0, 2)]))
    adjusted(original)
    targets = np.array(original.constraints[0].bondlengths)
    original.set_positions(original.positions * 1.01, apply_constraint=False)
    rebuilt = over_the_wire(original)
    assert rebuilt.constraints[0].bondlengths.tobytes() == targets.tobytes()
    assert not np.allclose(rebuilt.get_distances(0, [1, 2]), targets)  # the atoms moved
    for before, after in zip(adjusted(original, 3), adjusted(rebuilt, 3), strict=True):
        assert before.tobytes() == after.tobytes()


def test_negative_pair_index_travels_as_the_atom_ase_means() -> None:
    atoms = Atoms("Cu3", positions=[(0, 0, 0), (2.5, 0, 0), (5, 0, 0)])
    atoms.set_constraint(FixBondLengths([(0, -2)]))
    assert over_the_wire(atoms).constraints[0].pairs.tolist() == [[0, 1]]


class PinnedAtoms(FixAtoms):
    """A subclass may act differently from the constraint it derives from."""


def test_a_subclass_of_a_supported_constraint_is_refused_by_its_own_name() -> None:
    atoms = molecule("H2O")
    atoms.set_constraint(PinnedAtoms(indices=[0]))
    with pytest.raises(StructureError, match="constraint PinnedAtoms cannot be sent"):
        Structure.from_atoms(atoms)


# -- masses and extra arrays: what a plain structure sends, and what is refused ----------
def test_default_masses_and_no_extras_leave_the_new_fields_at_their_defaults() -> None:
    # ASE keeps no masses array while its standard weights apply; nothing is sent then,
    # and the rebuilt atoms use ASE's defaults again.
    structure = Structure.from_atoms(molecule("H2O"))
    assert structure.masses is None and structure.arrays == {}
    assert {"masses", "arrays"}.isdisjoint(structure.model_dump(exclude_defaults=True))
    back = structure.to_atoms()
    assert "masses" not in back.arrays
    assert back.get_masses().tolist() == molecule("H2O").get_masses().tolist()


def test_heavy_water_masses_come_back_exactly() -> None:
    back = over_the_wire(heavy_water())
    assert back.get_masses().tolist() == [15.999, DEUTERIUM_AMU, DEUTERIUM_AMU]
    assert back.get_masses()[1] != Atoms("H").get_masses()[0]  # not ASE's 1.008


@pytest.mark.parametrize("mass", [-2.0, math.nan, math.inf])
def test_a_mass_that_is_not_positive_and_finite_is_refused(mass: float) -> None:
    atoms = heavy_water()
    masses = atoms.get_masses()
    masses[2] = mass
    atoms.set_masses(masses)
    with pytest.raises(StructureError, match=r"mass of atom 2 \(H\) is") as caught:
        Structure.from_atoms(atoms)
    assert "set_masses" in str(caught.value)


@pytest.mark.parametrize(
    ("name", "value", "fragment"),
    [
        ("field", np.array([[0.0, 1.0], [math.inf, 0.0], [0.0, 0.0]]), "not finite at atom 1"),
        ("weights", np.ones(3, dtype=np.float32), "dtype float32"),
        ("raw", np.array([b"a", b"b", b"c"]), "dtype |S1"),
        ("empty_rows", np.zeros((3, 0)), "has shape (3, 0)"),
        ("too_long", np.zeros(4), "has shape (4,) but there are 3 atoms"),
        ("a:b", np.zeros(3), "is not a plain name"),
        ("symbols", np.array(["O", "H", "H"]), "ASE's own name"),
    ],
)
def test_more_arrays_that_cannot_travel_are_refused_by_name(
    name: str, value: np.ndarray, fragment: str
) -> None:
    atoms = molecule("H2O")
    atoms.arrays[name] = value  # past ASE's own checks, as code that edits arrays can
    with pytest.raises(StructureError) as caught:
        Structure.from_atoms(atoms)
    assert f"atoms.arrays[{name!r}]" in str(caught.value)
    assert fragment in str(caught.value)


# -- malformed structures: pydantic ValidationError naming the problem -----------------
def cu_dimer(**overrides: Any) -> dict[str, Any]:
    body: dict[str, Any] = {"numbers": [29, 29], "positions": [[0, 0, 0], [2.5, 0, 0]]}
    body.update(overrides)
    return body


@pytest.mark.parametrize(
    ("fields", "fragment"),
    [
        ({"positions": [[0, 0, 0], [math.nan, 0, 0]]}, "position of atom 1 is not finite"),
        ({"positions": [[0, math.inf, 0], [2.5, 0, 0]]}, "position of atom 0 is not finite"),
        ({"positions": [[0, 0, 0], [-math.inf, 0, 0]]}, "position of atom 1 is not finite"),
        ({"cell": [[math.nan, 0, 0], [0, 1, 0], [0, 0, 1]]}, "cell contains a value"),
        ({"initial_charges": [0.0, math.inf]}, "initial_charges contains a value"),
        ({"numbers": [], "positions": []}, "structure has no atoms"),
        ({"positions": [[0, 0, 0]]}, "positions has 1 entries but there are 2 atoms"),
        ({"tags": [1, 2, 3]}, "tags has 3 entries but there are 2 atoms"),
        ({"initial_magmoms": [1.0]}, "initial_magmoms has 1 entries but there are 2 atoms"),
        ({"momenta": [[0, 0, 0]]}, "momenta has 1 entries but there are 2 atoms"),
        ({"numbers": [29, 0]}, "atomic number 0 is not an element"),
        ({"numbers": [119, 29]}, "atomic number 119 is not an element"),
        (
            {"constraints": [{"type": "FixAtoms", "indices": [0, 2]}]},
            "FixAtoms names atom index 2, but there are 2 atoms",
        ),
        (
            {
                "constraints": [
                    {"type": "FixCartesian", "indices": [-1], "mask": [True, False, False]}
                ]
            },
            "FixCartesian names atom index -1",
        ),
        ({"constraints": [{"type": "FixBondLength", "indices": [0, 1]}]}, "FixBondLength"),
        ({"positions": [[0, 0, 0], [1, 2]]}, "positions.1"),
        ({"colour": "blue"}, "colour"),
        # what the service receives for the newer fields is checked by the model too
        ({"masses": [63.546]}, "masses has 1 entries but there are 2 atoms"),
        ({"masses": [63.546, 0.0]}, "mass of atom 1 (Cu) is 0.0"),
        ({"masses": [math.nan, 63.546]}, "mass of atom 0 (Cu) is nan"),
        (
            {"arrays": {"x": {"dtype": "float64", "shape": [3], "values": [0.0, 0.0, 0.0]}}},
            "per-atom array 'x' has shape (3,) but there are 2 atoms",
        ),
        (
            {"arrays": {"x": {"dtype": "float64", "shape": [2, 2], "values": [0.0, 1.0, 2.0]}}},
            "per-atom array 'x' has shape (2, 2) but 3 values",
        ),
        (
            {"arrays": {"x": {"dtype": "float64", "shape": [2], "values": [0.0, math.inf]}}},
            "per-atom array 'x' is inf at atom 1",
        ),
        (
            {"arrays": {"x": {"dtype": "int32", "shape": [2], "values": [0, 2**31]}}},
            "holds 2147483648, which does not fit int32",
        ),
        (
            {"arrays": {"x": {"dtype": "bool", "shape": [2], "values": [1, 0]}}},
            "arrays.x.bool.values.0",
        ),
        (
            {"arrays": {"x": {"dtype": "str", "width": 1, "shape": [2], "values": ["ab", "c"]}}},
            "holds 'ab', longer than its width 1",
        ),
        (
            {"arrays": {"x": {"dtype": "complex128", "shape": [2], "values": [0.0, 1.0]}}},
            "complex128",
        ),
        (
            {"arrays": {"x": {"dtype": "float64", "shape": [2, 1, 1], "values": [0.0, 1.0]}}},
            "reshape it to (natoms,) or (natoms, k)",
        ),
        (
            {"arrays": {"masses": {"dtype": "float64", "shape": [2], "values": [1.0, 2.0]}}},
            "travels in the structure's field 'masses'",
        ),
        (
            {"arrays": {"a b": {"dtype": "bool", "shape": [2], "values": [True, False]}}},
            "is not a plain name",
        ),
        (
            {"constraints": [{"type": "FixBondLengths", "pairs": [[0, 2]]}]},
            "FixBondLengths names atom index 2, but there are 2 atoms",
        ),
        (
            {"constraints": [{"type": "FixBondLengths", "pairs": [[1, 1]]}]},
            "pair (1, 1) names one atom twice",
        ),
        (
            {"constraints": [{"type": "FixBondLengths", "pairs": [[0, 1]], "bondlengths": []}]},
            "has 0 bond lengths for 1 pairs",
        ),
        (
            {"constraints": [{"type": "FixBondLengths", "pairs": [[0, 1]], "tolerance": -1.0}]},
            "tolerance -1.0 must be a finite number >= 0",
        ),
        (
            {"constraints": [{"type": "FixedPlane", "indices": [0], "direction": [0, 0, 0]}]},
            "FixedPlane direction [0.0, 0.0, 0.0] is not a direction",
        ),
        (
            {"constraints": [{"type": "FixedLine", "indices": [5], "direction": [1, 0, 0]}]},
            "FixedLine names atom index 5, but there are 2 atoms",
        ),
        (
            {"constraints": [{"type": "FixSubsetCom", "indices": [0, 0]}]},
            "FixSubsetCom lists atom 0 twice",
        ),
        ({"constraints": [{"type": "FixCom", "indices": [0]}]}, "constraints.0.FixCom.indices"),
    ],
    ids=lambda value: value if isinstance(value, str) else None,
)
def test_malformed_structure_is_refused_with_a_message(
    fields: dict[str, Any], fragment: str
) -> None:
    with pytest.raises(ValidationError) as caught:
        Structure.model_validate(cu_dimer(**fields))
    assert fragment in str(caught.value)


def test_malformed_json_text_is_refused_too() -> None:
    # The same validator runs on JSON text (the service's path); NaN spelled as JSON's
    # non-standard literal is refused, not stored.
    text = json.dumps(cu_dimer(positions=[[0, 0, 0], [math.nan, 0, 0]]), allow_nan=True)
    with pytest.raises(ValidationError, match="not finite"):
        Structure.model_validate_json(text)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(1, 118), min_size=1, max_size=40), st.booleans())
def test_chemical_formula_is_ases_hill_formula(numbers: list[int], with_carbon: bool) -> None:
    # Reference: ASE's own Atoms.get_chemical_formula(mode="hill"); carbon is forced in
    # half the cases, since its presence changes the order.
    if with_carbon:
        numbers = [*numbers, 6, 1]
    structure = Structure(
        numbers=numbers, positions=[(float(i), 0.0, 0.0) for i in range(len(numbers))]
    )
    assert structure.chemical_formula() == Atoms(numbers=numbers).get_chemical_formula(mode="hill")
