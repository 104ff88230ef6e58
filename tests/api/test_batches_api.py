"""Batches through the in-process API: all or nothing, order kept, results in bulk,
earlier results reused, retries answered once. Jobs run with the worker's own code."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT
from sqlalchemy import func
from sqlmodel import Session, select

from atomq import Structure
from atomq_service.batches import shrinking_sizes
from atomq_service.models import Batch, Job, JobTag
from atomq_workers.execute import run_job
from tests.conftest import App


def cells(count: int, seed: int = 0) -> list[Any]:
    """Distinct rattled Cu cells of 4 atoms (Brackenfield group's lattice screening)."""
    out = []
    for index in range(count):
        atoms = bulk("Cu", "fcc", a=3.61, cubic=True)
        atoms.rattle(0.05, seed=seed * 1000 + index)
        out.append(atoms)
    return out


def body(structures: list[Any], **fields: Any) -> dict[str, Any]:
    return {
        "structures": [Structure.from_atoms(a).model_dump(mode="json") for a in structures],
        "task": {"kind": "single_point"},
        "calculator": "emt",
        **fields,
    }


def rows(app: App) -> dict[str, int]:
    with Session(app.engine) as session:
        return {
            model.__name__: session.exec(select(func.count()).select_from(model)).one()
            for model in (Batch, Job, JobTag)
        }


def post(app: App, payload: dict[str, Any], **headers: str) -> Any:
    return app.http.post("/v1/batches", json=payload, headers={**app.headers, **headers})


def run_all(app: App, job_ids: list[int]) -> None:
    for job_id in job_ids:
        assert run_job(app.engine, job_id, app.settings).state == "succeeded"


def test_results_come_back_in_submission_order_equal_to_ase(app: App) -> None:
    structures = cells(7)
    created = post(app, body(structures, tags=["lattice-screen"]))
    assert created.status_code == 201, created.text
    batch = created.json()
    assert batch["size"] == 7 and batch["counts"] == {"queued": 7} and not batch["finished"]
    run_all(app, batch["job_ids"])

    shown = app.http.get(f"/v1/batches/{batch['id']}", headers=app.headers).json()
    assert shown["counts"] == {"succeeded": 7} and shown["finished"]
    page = app.http.get(
        f"/v1/batches/{batch['id']}/results", params={"limit": 5}, headers=app.headers
    ).json()
    rest = app.http.get(
        f"/v1/batches/{batch['id']}/results", params={"offset": 5}, headers=app.headers
    ).json()
    items = page["items"] + rest["items"]
    assert [item["index"] for item in items] == list(range(7))
    for item, atoms in zip(items, structures, strict=True):
        # Reference: ASE's EMT on the same structure, in this process.
        atoms.calc = EMT()
        assert item["result"]["energy"] == atoms.get_potential_energy()
        np.testing.assert_array_equal(item["result"]["forces"], atoms.get_forces())
    tagged = app.http.get("/v1/jobs", params={"tag": "lattice-screen"}, headers=app.headers)
    assert tagged.json()["total"] == 7


def test_one_bad_structure_refuses_the_whole_batch_and_names_it(app: App) -> None:
    structures = cells(5)
    structures[3].positions[1] = structures[3].positions[0] + [0.1, 0.0, 0.0]
    before = rows(app)
    refused = post(app, body(structures))
    assert refused.status_code == 422
    assert refused.json()["detail"].startswith("structure 3: atom 0 (Cu) and atom 1 (Cu)")
    assert rows(app) == before


@pytest.mark.parametrize(
    ("change", "status", "says"),
    [
        ({"task": {"kind": "neb"}}, 422, "task"),
        ({"structures": []}, 422, "structures"),
        ({"calculator": "emtt"}, 422, "unknown calculator 'emtt'"),
        ({"calculator": "lj-argon"}, 422, "lj-argon@1 does not cover Cu"),
    ],
    ids=["neb is not a batch task", "no structures", "unknown calculator", "uncovered element"],
)
def test_bad_batches_are_refused_and_nothing_is_written(
    app: App, change: dict[str, Any], status: int, says: str
) -> None:
    before = rows(app)
    refused = post(app, {**body(cells(2)), **change})
    assert refused.status_code == status, refused.text
    assert says in refused.text
    assert rows(app) == before


def test_queue_limit_counts_the_whole_batch(app: App) -> None:
    app.settings.max_queued_per_user = 5
    before = rows(app)
    refused = post(app, body(cells(6)))
    assert refused.status_code == 429
    assert "ask for 6 more" in refused.json()["detail"]
    assert rows(app) == before
    assert post(app, body(cells(5))).status_code == 201


def test_identical_structures_reuse_earlier_results_unless_told_not_to(app: App) -> None:
    first = post(app, body(cells(3))).json()
    run_all(app, first["job_ids"])
    # Two already computed, one new.
    mixed = post(app, body([*cells(3)[:2], *cells(1, seed=9)])).json()
    assert mixed["counts"] == {"succeeded": 2, "queued": 1}
    with Session(app.engine) as session:
        reused = [session.get(Job, job_id) for job_id in mixed["job_ids"][:2]]
    assert [job.reused_from for job in reused if job] == first["job_ids"][:2]
    fresh = post(app, body(cells(3), reuse=False)).json()
    assert fresh["counts"] == {"queued": 3}


def test_retry_with_the_same_key_returns_the_same_batch(app: App) -> None:
    payload = body(cells(3))
    first = post(app, payload, **{"Idempotency-Key": "batch-try-1"}).json()
    again = post(app, payload, **{"Idempotency-Key": "batch-try-1"})
    assert again.status_code == 201 and again.json()["id"] == first["id"]
    assert rows(app)["Job"] == 3
    other = post(app, body(cells(2)), **{"Idempotency-Key": "batch-try-1"})
    assert other.status_code == 422 and other.json()["code"] == "idempotency_key_reused"


def test_md_batch_draws_one_recorded_seed_per_structure(app: App) -> None:
    md = {
        "kind": "md",
        "ensemble": "nve",
        "temperature_K": 300.0,
        "timestep_fs": 1.0,
        "steps": 2,
    }
    batch = post(app, {**body(cells(4)), "task": md}).json()
    with Session(app.engine) as session:
        seeds = [session.get(Job, job_id).seed for job_id in batch["job_ids"]]  # type: ignore[union-attr]
    assert None not in seeds and len(set(seeds)) == 4


def test_cancel_ends_queued_jobs_and_keeps_finished_ones(app: App) -> None:
    batch = post(app, body(cells(4))).json()
    run_all(app, batch["job_ids"][:1])
    cancelled = app.http.post(f"/v1/batches/{batch['id']}/cancel", headers=app.headers).json()
    assert cancelled["counts"] == {"succeeded": 1, "cancelled": 3} and cancelled["finished"]


@pytest.mark.parametrize(("jobs", "processes"), [(1, 2), (7, 1), (1000, 2), (20_000, 8)])
def test_messages_shrink_towards_the_end_and_carry_every_job_once(
    jobs: int, processes: int
) -> None:
    sizes = shrinking_sizes(jobs, processes)
    assert sum(sizes) == jobs and all(1 <= size <= 32 for size in sizes)
    assert sizes == sorted(sizes, reverse=True)  # never a big message after a small one
    assert sizes[-1] == 1  # the processes finish within one job of each other
