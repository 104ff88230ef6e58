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
