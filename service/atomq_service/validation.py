"""Checks a job must pass before anything is written. Each names what is wrong and
how to fix it."""

from __future__ import annotations

import numpy as np
from ase.data import chemical_symbols
from ase.neighborlist import neighbor_list

from atomq.jobs import JobCreate
from atomq.structure import Structure
from atomq.tasks import Relax, task_steps
from atomq_service.errors import ApiError
from atomq_service.models import Calculator
from atomq_service.settings import Settings


def check_job(job: JobCreate, calculator: Calculator, settings: Settings) -> None:
    structure = job.structure
    if structure.natoms > settings.max_atoms:
        raise ApiError(
            422,
            "too_many_atoms",
            f"structure has {structure.natoms} atoms; this service accepts at most "
            f"{settings.max_atoms} (ATOMQ_MAX_ATOMS)",
        )
    steps = task_steps(job.task)
    if steps > settings.max_steps:
        raise ApiError(
            422,
            "too_many_steps",
            f"task asks for {steps} steps; this service accepts at most "
            f"{settings.max_steps} (ATOMQ_MAX_STEPS)",
        )
    check_elements(structure, calculator)
    check_magnitudes(structure)
    check_cell(structure)
    if isinstance(job.task, Relax) and job.task.cell is not None and not all(structure.pbc):
        raise ApiError(
            422,
            "cell_relax_needs_pbc",
            "cell relaxation needs a structure periodic in all three directions; "
            "set pbc=True or drop the `cell` option",
        )
    check_distances(structure, settings.min_distance)


def check_elements(structure: Structure, calculator: Calculator) -> None:
    covered = set(calculator.elements)
    present = {chemical_symbols[z] for z in structure.numbers}
    missing = sorted(present - covered)
    if missing:
        raise ApiError(
            422,
            "element_not_covered",
            f"calculator {calculator.ref} does not cover {', '.join(missing)}; "
            f"it covers {', '.join(sorted(covered))}",
        )


# Beyond a micrometre a structure is no longer atomistic; such values are unit mistakes,
# and they overflow the neighbour search.
MAX_LENGTH = 1e4


def check_magnitudes(structure: Structure) -> None:
    largest_cell = float(np.abs(np.array(structure.cell)).max())
    largest_position = float(np.abs(np.array(structure.positions)).max())
    if max(largest_cell, largest_position) > MAX_LENGTH:
        what = "cell vector" if largest_cell >= largest_position else "position"
        raise ApiError(
            422,
            "length_out_of_range",
            f"a {what} component is {max(largest_cell, largest_position):.3g} Angstrom; "
            f"lengths above {MAX_LENGTH:g} Angstrom (1 micrometre) are refused: check units",
        )


def check_cell(structure: Structure) -> None:
    pbc = np.array(structure.pbc)
    if not pbc.any():
        return
    cell = np.array(structure.cell)
    periodic = cell[pbc]
    # The periodic cell vectors must span as many dimensions as there are periodic axes.
    scale = max(float(np.abs(cell).max()), 1.0)
    rank = int(np.linalg.matrix_rank(periodic, tol=1e-8 * scale))
    if rank < int(pbc.sum()):
        axes = ", ".join("abc"[i] for i in np.flatnonzero(pbc))
        raise ApiError(
            422,
            "degenerate_cell",
            f"the cell has zero volume along its periodic axes ({axes}); "
            "give non-zero, independent cell vectors or set pbc=False",
        )


def check_distances(structure: Structure, min_distance: float) -> None:
    if structure.natoms < 2 and not any(structure.pbc):
        return
    atoms = structure.to_atoms()
    # A periodic cell thinner than the threshold puts every atom next to its own images;
    # refuse it before a neighbour search whose cost grows as (threshold / thickness)^3.
    for axis, thickness in periodic_thickness(np.array(structure.cell), structure.pbc):
        if thickness < min_distance:
            raise ApiError(
                422,
                "atoms_too_close",
                f"the cell is only {thickness:.3g} Angstrom thick along {'abc'[axis]}, so atoms "
                f"are closer than {min_distance} Angstrom to their own periodic images; "
                "check the cell (Angstrom) or set pbc=False",
            )
    first, second, distance = neighbor_list("ijd", atoms, min_distance, self_interaction=False)
    if len(distance):
        k = int(np.argmin(distance))
        i, j = int(first[k]), int(second[k])
        symbols = atoms.get_chemical_symbols()
        what = "its own periodic image" if i == j else f"atom {j} ({symbols[j]})"
        raise ApiError(
            422,
            "atoms_too_close",
            f"atom {i} ({symbols[i]}) and {what} are {distance[k]:.3f} Angstrom apart, "
            f"closer than {min_distance} Angstrom; check units (Angstrom) and duplicated atoms",
        )


def periodic_thickness(cell: np.ndarray, pbc: tuple[bool, bool, bool]) -> list[tuple[int, float]]:
    """For each periodic axis, the distance from its cell vector to the span of the other
    periodic vectors: the spacing of the lattice planes that repeat along that axis.
    Non-periodic vectors play no part (they do not repeat the atoms)."""
    periodic = [axis for axis in range(3) if pbc[axis]]
    result = []
    for axis in periodic:
        others = cell[[a for a in periodic if a != axis]]
        vector = cell[axis]
        if len(others):
            coefficients, *_ = np.linalg.lstsq(others.T, vector, rcond=None)
            vector = vector - others.T @ coefficients
        result.append((axis, float(np.linalg.norm(vector))))
    return result
