"""The closest-pair check that guards every submission, against ASE's neighbour list."""

from __future__ import annotations

import numpy as np
import pytest
from ase.build import bulk, fcc111, molecule
from ase.neighborlist import neighbor_list

from atomq_service.validation import cell_geometry, closest_pair, periodic_thickness


def our_closest(atoms, cutoff: float) -> tuple[int, int, float] | None:  # type: ignore[no-untyped-def]
    cell = tuple(tuple(float(x) for x in row) for row in atoms.cell.array)
    geometry = cell_geometry(cell, tuple(bool(p) for p in atoms.pbc))
    return closest_pair(atoms.positions, geometry, cutoff)


def ase_closest(atoms, cutoff: float) -> float | None:  # type: ignore[no-untyped-def]
    """Reference: ASE's neighbour list, minimum over every pair and periodic image."""
    _, _, distance = neighbor_list("ijd", atoms, cutoff, self_interaction=False)
    return float(distance.min()) if len(distance) else None


@pytest.mark.parametrize("seed", range(60))
def test_pair_search_in_small_cells_equals_ases_neighbour_list(seed: int) -> None:
    rng = np.random.default_rng(seed)
    atoms = bulk("Cu", "fcc", a=3.61).repeat(tuple(rng.integers(1, 4, size=3)))
    atoms.rattle(0.5, seed=seed)
    # Sheared cells too: the search must not assume right angles.
    strain = np.eye(3) + 0.1 * rng.standard_normal((3, 3))
    atoms.set_cell(atoms.cell.array @ strain, scale_atoms=True)
    atoms.positions += rng.uniform(-5, 5, size=3)  # outside the cell: wrapped first
    # The caller refuses cells thinner than the cutoff before searching: stay below it.
    thinnest = min(t for _, t in periodic_thickness(atoms.cell.array, (True, True, True)))
    cutoff = min(2.4, 0.99 * thinnest)
    found = our_closest(atoms, cutoff)
    reference = ase_closest(atoms, cutoff)
    assert (found is None) == (reference is None)
    if found is not None:
        assert found[2] == pytest.approx(reference, abs=1e-9)


@pytest.mark.parametrize(
    "atoms",
    [molecule("CH3CH2OH"), fcc111("Cu", (3, 3, 3), vacuum=6.0)],
    ids=["molecule (no pbc)", "slab (mixed pbc: neighbour list)"],
)
def test_molecules_and_slabs_agree_with_ase(atoms) -> None:  # type: ignore[no-untyped-def]
    for cutoff in (1.0, 1.2, 2.6):
        found = our_closest(atoms, cutoff)
        reference = ase_closest(atoms, cutoff)
        assert (found is None) == (reference is None)
        if found is not None:
            assert found[2] == pytest.approx(reference, abs=1e-9)


@pytest.mark.parametrize("seed", range(12))
def test_pair_search_in_larger_cells_and_clusters_equals_ases_neighbour_list(seed: int) -> None:
    rng = np.random.default_rng(100 + seed)
    periodic = seed % 3 != 0
    atoms = bulk("Cu", "fcc", a=3.61).repeat((6, 6, 6))  # 216 atoms
    strain = np.eye(3) + 0.1 * rng.standard_normal((3, 3))
    atoms.set_cell(atoms.cell.array @ strain, scale_atoms=True)
    atoms.rattle(0.6, seed=seed)
    atoms.positions += rng.uniform(-8, 8, size=3)
    atoms.pbc = periodic  # a cluster when not periodic
    thinnest = min(t for _, t in periodic_thickness(atoms.cell.array, (True, True, True)))
    for cutoff in (1.0, min(2.2, 0.99 * thinnest)):
        found = our_closest(atoms, cutoff)
        reference = ase_closest(atoms, cutoff)
        assert (found is None) == (reference is None)
        if found is not None:
            assert found[2] == pytest.approx(reference, abs=1e-9)
            # The reported pair is a real pair at that distance (minimum image).
            i, j, distance = found
            assert atoms.get_distance(i, j, mic=periodic) == pytest.approx(distance, abs=1e-9)
