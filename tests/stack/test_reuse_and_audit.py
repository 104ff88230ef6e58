"""Result reuse and audit queries through the real stack: uvicorn, a Celery worker process
and Redis.

The reference for the energy is ASE's EMT run in this test process on the same structure.
"""

from __future__ import annotations

import ase
import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk
from ase.calculators.emt import EMT
from sqlalchemy import func
from sqlmodel import Session, select

from atomq import JobState, SinglePoint
from atomq_service.models import JobAttempt
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack


def rattled_copper() -> Atoms:
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat((2, 2, 2))
    atoms.rattle(stdev=0.05, seed=11)
    return atoms


def attempts_in_all(stack: Stack) -> int:
    with Session(stack.engine) as session:
        return session.exec(select(func.count()).select_from(JobAttempt)).one()


def test_a_repeat_is_reused_and_a_fresh_run_computes_again(redis_stack: Stack) -> None:
    with redis_stack.client() as client:
        first = client.submit(rattled_copper(), SinglePoint(), calculator="emt")
        assert first.wait(timeout=60).state is JobState.succeeded
        assert attempts_in_all(redis_stack) == 1

        again = client.submit(rattled_copper(), SinglePoint(), calculator="emt")
        info = again.info()  # no wait(): it is finished already
        assert info.state is JobState.succeeded
        assert (info.reused_from, info.attempts) == (first.id, 0)
        assert again.result() == first.result()
        assert again.atoms().get_potential_energy() == first.atoms().get_potential_energy()
        assert np.array_equal(again.atoms().get_forces(), first.atoms().get_forces())
        assert again.provenance() == first.provenance()  # it names the job that ran
        assert attempts_in_all(redis_stack) == 1  # nothing ran for the repeat

        fresh = client.submit(rattled_copper(), SinglePoint(), calculator="emt", reuse=False)
        fresh_info = fresh.wait(timeout=60)
        assert fresh_info.state is JobState.succeeded
        assert (fresh_info.reused_from, fresh_info.attempts) == (None, 1)
        assert attempts_in_all(redis_stack) == 2
        assert fresh.provenance().job_id == fresh.id
        energies = [job.atoms().get_potential_energy() for job in (fresh, again)]

    # Reference: ASE's EMT evaluated in this process on the same structure.
    reference = rattled_copper()
    reference.calc = EMT()
    assert energies == [reference.get_potential_energy()] * 2


def test_jobs_are_found_by_the_package_version_they_ran_with(redis_stack: Stack) -> None:
    with redis_stack.client() as client:
        job = client.submit(rattled_copper(), SinglePoint(), calculator="emt")
        assert job.wait(timeout=60).state is JobState.succeeded

        # The installed ase, read by ASE itself: the worker runs in this same environment.
        found = client.jobs(package="ase", package_version=ase.__version__)
        wrong = client.jobs(package="ase", package_version=ase.__version__ + ".post99")
        any_version = client.jobs(package="ase")

    assert [item.id for item in found.items] == [job.id]
    assert (wrong.total, wrong.items) == (0, [])
    assert [item.id for item in any_version.items] == [job.id]
