"""The Structure contract: ase.Atoms -> JSON -> ase.Atoms is lossless, and what cannot
travel (or is malformed) is refused with a message that names the problem."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from ase import Atoms
from ase.build import add_adsorbate, fcc100
from ase.constraints import FixAtoms, FixBondLength, FixCartesian
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from atomq.structure import Structure, StructureError

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

    constraints: list[FixAtoms | FixCartesian] = []
    if draw(st.booleans()):
        constraints.append(FixAtoms(mask=draw(st.lists(st.booleans(), min_size=n, max_size=n))))
    if draw(st.booleans()):
        selected = draw(st.lists(st.booleans(), min_size=n, max_size=n))
        indices = [i for i, chosen in enumerate(selected) if chosen]
        constraints.append(FixCartesian(indices, mask=draw(mask3)))
    if constraints:
        atoms.set_constraint(constraints)
    atoms.info = draw(info_dicts)
    return atoms


def assert_bitwise_equal(name: str, before: np.ndarray, after: np.ndarray) -> None:
    assert before.dtype.kind == after.dtype.kind, f"{name}: dtype {before.dtype} -> {after.dtype}"
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
@given(random_atoms())
def test_atoms_survive_the_wire_bit_for_bit(atoms: Atoms) -> None:
    wire = Structure.from_atoms(atoms).model_dump_json()
    back = Structure.model_validate_json(wire).to_atoms()

    assert_bitwise_equal("numbers", atoms.numbers, back.numbers)
    assert_bitwise_equal("pbc", atoms.pbc, back.pbc)
    assert_bitwise_equal("cell", atoms.cell.array, back.cell.array)
    # Every per-atom array (positions, charges, magmoms, momenta, tags) and no extra ones.
    assert set(back.arrays) == set(atoms.arrays)
    for name, before in atoms.arrays.items():
        assert_bitwise_equal(name, before, back.arrays[name])

    assert len(back.constraints) == len(atoms.constraints)
    for before, after in zip(atoms.constraints, back.constraints, strict=True):
        assert type(after) is type(before)
        assert np.array_equal(before.index, after.index)
        if isinstance(before, FixCartesian):
            assert np.array_equal(before.mask, after.mask)

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


def test_unsupported_constraint_is_refused_by_name() -> None:
    atoms = Atoms("Cu2", positions=[(0, 0, 0), (2.5, 0, 0)])
    constraint = FixBondLength(0, 1)  # ASE builds a FixBondLengths for one pair
    atoms.set_constraint(constraint)
    name = type(constraint).__name__
    with pytest.raises(StructureError, match=f"constraint {name} cannot be sent") as caught:
        Structure.from_atoms(atoms)
    assert "supported are FixAtoms and FixCartesian" in str(caught.value)


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
