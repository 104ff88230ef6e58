"""The canonical input hash. Outside reference for version 1: the hashes the code at
commit 780447e wrote into the committed fixture database (tests/fixtures/pre_migration)."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from ase.build import bulk
from pydantic import Field, TypeAdapter

from atomq import MD, NEB, CellRelax, Relax, SinglePoint, Structure
from atomq.hashing import hash_of, input_hash, v1_hash
from atomq.tasks import Task, TaskSpec

FIXTURE = Path(__file__).parents[1] / "fixtures" / "pre_migration" / "atomq.db"
CU = Structure.from_atoms(bulk("Cu", "fcc", a=3.62, cubic=True))


class RelaxLater(Relax):
    """Relax as a later atomq might define it: one more field, whose default means
    "as before"."""

    line_search_damping: float = Field(default=1.0, gt=0)


class StructureLater(Structure):
    """A structure with a field added later, holding its default."""

    spin_multiplicity: int | None = None


def test_a_new_defaulted_field_does_not_move_the_hash() -> None:
    before = input_hash(CU, Relax(fmax=0.02), "emt@1", None)
    assert input_hash(CU, RelaxLater(fmax=0.02), "emt@1", None) == before
    later_structure = StructureLater.model_validate(CU.model_dump())
    assert input_hash(later_structure, Relax(fmax=0.02), "emt@1", None) == before
    # ... and a value of its own does move it: the check can fail.
    assert input_hash(CU, RelaxLater(fmax=0.02, line_search_damping=0.5), "emt@1", None) != before


def test_defaults_given_explicitly_hash_as_left_out() -> None:
    assert input_hash(CU, Relax(), "emt@1", None) == input_hash(
        CU, Relax(optimizer="BFGS", fmax=0.05, max_steps=500, cell=None), "emt@1", None
    )
    assert input_hash(CU, Relax(cell=CellRelax()), "emt@1", None) != input_hash(
        CU, Relax(), "emt@1", None
    )  # relaxing the cell (with its own defaults) is other work


@pytest.mark.parametrize(
    "tasks",
    [
        (SinglePoint(), Relax()),
        (Relax(fmax=0.05), Relax(fmax=0.02)),
        (
            MD(ensemble="nve", temperature_K=300, timestep_fs=1, steps=10, seed=1),
            MD(ensemble="nve", temperature_K=300, timestep_fs=1, steps=10, seed=2),
        ),
    ],
)
def test_different_work_hashes_differently(tasks: tuple[Task, Task]) -> None:
    first, second = tasks
    seeds = [t.seed if isinstance(t, MD) else None for t in tasks]
    assert input_hash(CU, first, "emt@1", seeds[0]) != input_hash(CU, second, "emt@1", seeds[1])


def test_the_calculator_version_and_atoms_info_count() -> None:
    task = SinglePoint()
    assert input_hash(CU, task, "emt@1", None) != input_hash(CU, task, "emt@2", None)
    noted = CU.model_copy(update={"info": {"comment": "from the group's notebook"}})
    assert input_hash(noted, task, "emt@1", None) != input_hash(CU, task, "emt@1", None)


def test_version_1_hashes_of_the_fixture_are_reproduced() -> None:
    """Every job the code at 780447e recorded: its stored structure and task, read by
    today's models, give the hash that code wrote."""
    tasks: TypeAdapter[Task] = TypeAdapter(TaskSpec)
    with sqlite3.connect(FIXTURE) as connection:
        rows = connection.execute(
            "SELECT structure, task, calculator_ref, seed, input_hash, kind FROM job"
        ).fetchall()
    assert {row[5] for row in rows} == {"single_point", "relax", "md", "neb"}
    for structure_text, task_text, ref, seed, stored, _kind in rows:
        structure = Structure.model_validate_json(structure_text)
        task = tasks.validate_json(task_text)
        old = v1_hash(
            structure, structure.model_dump(mode="json"), task, task.model_dump(mode="json"),
            ref, seed,
        )  # fmt: skip
        assert old == stored
        # Version 2 is another canonical form, never confused with version 1.
        new = hash_of(
            structure, structure.model_dump(mode="json"), task, task.model_dump(mode="json"),
            ref, seed,
        )  # fmt: skip
        assert new != stored


def test_version_1_cannot_express_what_did_not_exist() -> None:
    later = RelaxLater(fmax=0.02, line_search_damping=0.5)
    assert v1_hash(CU, CU.model_dump(mode="json"), later, later.model_dump(mode="json"),
                   "emt@1", None) is None  # fmt: skip
    neb = NEB(initial=CU, final=CU)
    assert v1_hash(CU, CU.model_dump(mode="json"), neb, neb.model_dump(mode="json"),
                   "emt@1", None) is not None  # fmt: skip
    plain = RelaxLater(fmax=0.02)  # the new field at its default: version 1 expresses it
    assert v1_hash(CU, CU.model_dump(mode="json"), plain, plain.model_dump(mode="json"),
                   "emt@1", None) == v1_hash(CU, CU.model_dump(mode="json"), Relax(fmax=0.02),
                                             Relax(fmax=0.02).model_dump(mode="json"),
                                             "emt@1", None)  # fmt: skip
