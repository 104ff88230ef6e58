"""Single points of a batch message, claimed and recorded together: each job still gets
its own attempt, result and provenance, and a job taken over meanwhile is not written."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from ase.build import bulk
from ase.calculators.emt import EMT
from sqlalchemy import update
from sqlmodel import Session, col, select

from atomq import SinglePoint, Structure
from atomq.hashing import input_hash
from atomq_service.db import make_engine
from atomq_service.models import Job, JobAttempt, JobPackage, JobResult
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.settings import Settings
from atomq_service.users import add_user
from atomq_workers.execute import claim_group, compute, finish_group, run_single_points


def cells(count: int) -> list:  # type: ignore[type-arg]
    out = []
    for index in range(count):
        atoms = bulk("Cu", "fcc", a=3.61, cubic=True)
        atoms.rattle(0.05, seed=index)
        out.append(atoms)
    return out


def setup(tmp_path: Path, structures: list, kind_of: list[str] | None = None):  # type: ignore[no-untyped-def, type-arg]
    settings = Settings(data_dir=tmp_path, broker_url="memory://")
    engine = make_engine(settings.resolved_database_url)
    prepare_schema(engine)
    seed_defaults(engine)
    add_user(engine, "hana")
    with Session(engine) as session:
        for atoms in structures:
            structure = Structure.from_atoms(atoms)
            session.add(
                Job(
                    owner_id=1,
                    kind="single_point",
                    calculator_id=1,
                    calculator_ref="emt@1",
                    task=SinglePoint().model_dump(mode="json"),
                    structure=structure.model_dump(mode="json"),
                    natoms=len(atoms),
                    formula=atoms.get_chemical_formula(),
                    input_hash=input_hash(structure, SinglePoint(), "emt@1", None),
                    time_limit_s=60,
                )
            )
        session.commit()
    return engine, settings


def test_each_job_of_a_group_gets_its_own_attempt_result_and_provenance(tmp_path: Path) -> None:
    structures = cells(5)
    engine, settings = setup(tmp_path, structures)
    outcomes = run_single_points(engine, [1, 2, 3, 4, 5], settings)
    assert [o.state for o in outcomes] == ["succeeded"] * 5
    with Session(engine) as session:
        for job_id, atoms in enumerate(structures, start=1):
            stored = session.get(JobResult, job_id)
            assert stored is not None and stored.provenance["job_id"] == job_id
            # Reference: ASE's EMT on the same cell, in this process.
            atoms.calc = EMT()
            assert stored.result["energy"] == atoms.get_potential_energy()
            np.testing.assert_array_equal(stored.result["forces"], atoms.get_forces())
        attempts = session.exec(select(JobAttempt).order_by(col(JobAttempt.job_id))).all()
        assert [(a.job_id, a.attempt, a.outcome) for a in attempts] == [
            (i, 1, "succeeded") for i in range(1, 6)
        ]
        packages = session.exec(select(JobPackage).where(JobPackage.package == "ase")).all()
        assert len(packages) == 5
    # A redelivery of the same message runs nothing again.
    assert [o.state for o in run_single_points(engine, [1, 2, 3, 4, 5], settings)] == [
        "finished"
    ] * 5


def test_a_job_taken_over_during_the_group_is_not_written(tmp_path: Path) -> None:
    engine, settings = setup(tmp_path, cells(3))
    claimed = claim_group(engine, [1, 2, 3], settings)
    assert [c.job.id for c in claimed] == [1, 2, 3]
    computed = []
    for one in claimed:
        # No lease thread in this test: a stand-in with a Lease's two flags.
        flags = type("Flags", (), {"lost": False, "cancel_requested": False})()
        result = compute(engine, one, settings, flags, float("inf"))  # type: ignore[arg-type]
        assert result is not None
        computed.append(result)
    # Meanwhile job 2's lease expired and another worker took it over (attempt 2).
    with engine.begin() as connection:
        connection.execute(
            update(Job).where(col(Job.id) == 2).values(attempts=2, worker="elsewhere:1")
        )
    outcomes = finish_group(engine, computed)
    assert {job_id: o.state for job_id, o in outcomes.items()} == {
        1: "succeeded",
        2: "superseded",
        3: "succeeded",
    }
    with Session(engine) as session:
        assert session.get(JobResult, 2) is None
        assert session.get(Job, 2).state == "running"  # type: ignore[union-attr]
        first = session.exec(
            select(JobAttempt).where(JobAttempt.job_id == 2, JobAttempt.attempt == 1)
        ).one()
        assert first.outcome == "superseded"


def test_cancel_requested_while_waiting_in_the_group_cancels_before_running(
    tmp_path: Path,
) -> None:
    engine, settings = setup(tmp_path, cells(2))
    claimed = claim_group(engine, [1, 2], settings)
    flags = type("Flags", (), {"lost": False, "cancel_requested": True})()
    computed = compute(engine, claimed[1], settings, flags, float("inf"))  # type: ignore[arg-type]
    assert computed is not None and computed.result is None
    assert finish_group(engine, [computed])[2].state == "cancelled"
