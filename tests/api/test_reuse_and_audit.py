"""Audit queries (weights hash, package versions, time range) and result reuse by input
hash, in-process: the app over SQLite, no worker. Finished jobs are written straight to
the database, as a worker would leave them, unless a test needs a real run (then the
worker's own code runs in this process).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

import ase
import httpx
import pytest
from ase import Atoms
from ase.calculators.emt import EMT
from fastapi.testclient import TestClient
from sqlalchemy import event, func, update
from sqlmodel import Session, col, select

from atomq import Client, InvalidRequest, JobState, SinglePoint
from atomq.cli import main as atomq_main
from atomq.results import Provenance, SinglePointResult
from atomq.structure import Structure
from atomq_service.app import create_app
from atomq_service.db import transaction
from atomq_service.jobs import package_rows
from atomq_service.messaging import Dispatcher
from atomq_service.models import Job, JobPackage, JobResult
from atomq_service.reconciler import reconcile_once
from atomq_service.registry import register
from atomq_service.settings import Settings
from atomq_workers.execute import run_job
from tests.api.bodies import CU_DIMER, SHORT_MD, SINGLE_POINT
from tests.conftest import App

# Made-up weights of a made-up lab potential: only their sha256 matters here.
WEIGHTS = hashlib.sha256(b"tern-lab potential, training round 1").hexdigest()
OTHER_WEIGHTS = hashlib.sha256(b"tern-lab potential, training round 2").hexdigest()


# -- helpers ---------------------------------------------------------------------------------
def post(app: App, body: dict[str, Any], headers: dict[str, str] | None = None) -> dict[str, Any]:
    response = app.http.post("/v1/jobs", json=body, headers=headers or app.headers)
    assert response.status_code == 201, response.text
    created: dict[str, Any] = response.json()
    return created


def emt_result(structure: dict[str, Any]) -> SinglePointResult:
    """The single point ASE's EMT gives for this structure, computed here."""
    atoms = Structure.model_validate(structure).to_atoms()
    atoms.calc = EMT()
    return SinglePointResult(
        energy=float(atoms.get_potential_energy()),
        forces=atoms.get_forces().tolist(),
        structure=Structure.from_atoms(atoms),
    )


def finish_directly(
    app: App,
    job_id: int,
    *,
    state: str = "succeeded",
    packages: dict[str, str] | None = None,
    result: dict[str, Any] | None = None,
    converged: bool | None = None,
) -> None:
    """End a job as a worker on host "node-a" would: state, result, provenance, package rows."""
    now = datetime.now(UTC)
    with transaction(app.engine) as session:
        job = session.get(Job, job_id)
        assert job is not None
        job.state, job.attempts, job.worker = state, 1, "node-a:4242"
        job.started_at = job.finished_at = now
        job.converged = converged
        session.add(job)
        if state != "succeeded":
            return
        if result is None:
            result = emt_result(job.structure).model_dump(mode="json")
        versions = packages or {"python": "3.11.9", "ase": "3.23.0", "numpy": "1.26.4"}
        provenance = Provenance(
            job_id=job_id,
            owner="ada-admin",
            input_hash=job.input_hash,
            calculator=job.calculator_ref,
            backend="emt",
            parameters={},
            weights_sha256=None,
            packages=versions,
            host="node-a",
            pid=4242,
            cpu="made-up CPU",
            threads={},
            seed=job.seed,
            attempt=1,
            parents=job.parents,
            started_at=now,
            finished_at=now,
        )
        session.add(
            JobResult(job_id=job_id, result=result, provenance=provenance.model_dump(mode="json"))
        )
        for package, version in versions.items():
            session.add(JobPackage(job_id=job_id, package=package, version=version))


def table_counts(app: App) -> dict[str, int]:
    with Session(app.engine) as session:
        packages = session.exec(select(func.count()).select_from(JobPackage)).one()
    return {**app.counts(), "JobPackage": packages}


def listed(app: App, params: dict[str, Any]) -> list[int]:
    response = app.http.get("/v1/jobs", params=params, headers=app.headers)
    assert response.status_code == 200, response.text
    page = response.json()
    assert page["total"] == len(page["items"])  # every test here fits one page
    return [job["id"] for job in page["items"]]


class RecordingDispatcher(Dispatcher):
    """Records the messages it would send; reports the broker emptied, the case in which
    the reconciler re-sends every queued job."""

    def __init__(self) -> None:
        super().__init__("memory://")
        self.sent: list[int] = []

    def broker_was_emptied(self) -> bool:
        return True

    def send(self, job_id: int, calculator_ref: str) -> bool:
        self.sent.append(job_id)
        return True


@pytest.fixture
def sent(app: App, monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Job ids the POST route dispatched."""
    recorder = RecordingDispatcher()
    monkeypatch.setattr(app.http.app.state, "dispatcher", recorder)  # type: ignore[attr-defined]
    return recorder.sent


# == audit queries ============================================================================
@pytest.fixture
def audit_jobs(app: App) -> dict[str, int]:
    """Jobs 1-5: two owners, three calculators (two with weights), package rows, and
    creation times a month apart."""
    with transaction(app.engine) as session:
        for name, weights in (("emt-weighted", WEIGHTS), ("emt-reweighted", OTHER_WEIGHTS)):
            register(
                session,
                name=name,
                version="1",
                backend="emt",
                elements=["Cu"],
                weights_sha256=weights,
                notes="a made-up weights file, for the audit tests",
            )
    member = {"Authorization": f"Bearer {app.token_for('bo-member')}"}
    study = ["tern-study"]
    ids = {
        "emt jan": post(app, {**SINGLE_POINT, "tags": study})["id"],
        "weighted feb member": post(
            app, {**SINGLE_POINT, "calculator": "emt-weighted", "tags": study}, member
        )["id"],
        "weighted mar": post(app, {**SINGLE_POINT, "calculator": "emt-weighted@1"})["id"],
        "emt apr queued": post(app, {**SINGLE_POINT, "reuse": False})["id"],
        "reweighted may": post(app, {**SINGLE_POINT, "calculator": "emt-reweighted"})["id"],
    }
    assert list(ids.values()) == [1, 2, 3, 4, 5]
    finish_directly(app, 1, packages={"ase": "3.23.0", "numpy": "1.26.4"})
    finish_directly(app, 2, packages={"ase": "3.23.0", "sevenn": "0.10.1"})
    finish_directly(app, 3, packages={"ase": "3.22.1", "sevenn": "0.11.0"})
    finish_directly(app, 5, packages={"ase": "3.23.0"})
    with transaction(app.engine) as session:
        for job_id, month in zip(ids.values(), range(1, 6), strict=True):
            session.execute(
                update(Job)
                .where(col(Job.id) == job_id)
                .values(created_at=datetime(2025, month, 10, tzinfo=UTC))
            )
    return ids


@pytest.mark.parametrize(
    ("params", "expected"),
    [
        ({"weights_sha256": WEIGHTS}, [3, 2]),
        ({"weights_sha256": WEIGHTS.upper()}, [3, 2]),
        ({"weights_sha256": OTHER_WEIGHTS}, [5]),
        ({"weights_sha256": "0" * 64}, []),
        ({"package": "ase"}, [5, 3, 2, 1]),
        ({"package": "ASE"}, [5, 3, 2, 1]),
        ({"package": "ase", "package_version": "3.23.0"}, [5, 2, 1]),
        ({"package": "ase", "package_version": "3.23"}, []),
        ({"package": "sevenn"}, [3, 2]),
        ({"package": "sevenn", "package_version": "0.11.0"}, [3]),
        ({"package": "torch"}, []),
        # created_after is inclusive, created_before exclusive: [after, before).
        ({"created_after": "2025-02-10T00:00:00Z"}, [5, 4, 3, 2]),
        ({"created_before": "2025-02-10T00:00:00Z"}, [1]),
        # The same instant written with another offset.
        ({"created_after": "2025-02-10T01:00:00+01:00"}, [5, 4, 3, 2]),
        ({"created_before": "2025-02-09T19:00:00-05:00"}, [1]),
        ({"created_after": "2025-02-01T00:00:00Z", "created_before": "2025-04-01T00:00Z"}, [3, 2]),
        ({"package": "ase", "state": "succeeded", "calculator": "emt"}, [1]),
        (
            {
                "weights_sha256": WEIGHTS,
                "package": "ase",
                "package_version": "3.23.0",
                "owner": "bo-member",
                "tag": "tern-study",
                "created_after": "2025-01-15T00:00:00Z",
                "created_before": "2025-03-01T00:00:00Z",
            },
            [2],
        ),
        ({"weights_sha256": WEIGHTS, "owner": "ada-admin"}, [3]),
        ({"package": "sevenn", "tag": "tern-study"}, [2]),
    ],
)
def test_audit_filters_return_exactly_the_matching_jobs(
    app: App, audit_jobs: dict[str, int], params: dict[str, str], expected: list[int]
) -> None:
    assert listed(app, params) == expected


def test_audit_filters_keep_pagination_and_the_total(app: App, audit_jobs: dict[str, int]) -> None:
    response = app.http.get(
        "/v1/jobs", params={"package": "ase", "offset": 1, "limit": 2}, headers=app.headers
    )
    page = response.json()
    assert [job["id"] for job in page["items"]] == [3, 2]
    assert page["total"] == 4


@pytest.mark.parametrize(
    ("params", "fragment"),
    [
        ({"weights_sha256": "abc123"}, "weights_sha256: String should match pattern"),
        ({"weights_sha256": "g" * 64}, "weights_sha256: String should match pattern"),
        ({"package_version": "3.23.0"}, "package_version '3.23.0' needs package"),
        ({"package": "ase==3.23.0"}, "package: String should match pattern"),
        ({"package": "ase", "package_version": "3.23 0"}, "package_version: String should"),
        ({"created_after": "2025-02-10T00:00:00"}, "created_after 2025-02-10T00:00:00 has no"),
        ({"created_before": "2025-02-10"}, "created_before 2025-02-10T00:00:00 has no timezone"),
        ({"created_after": "last tuesday"}, "created_after: Input should be a valid datetime"),
        ({"created_after": "2025-13-01T00:00:00Z"}, "created_after: Input should be a valid"),
        ({"created_before": "9999-12-31T23:00:00-05:00"}, "outside the years 1 to 9999"),
        ({"created_after": "0001-01-01T00:00:00+05:00"}, "outside the years 1 to 9999"),
        (
            {"created_after": "2025-03-01T00:00:00Z", "created_before": "2025-02-01T00:00:00Z"},
            "is not earlier than created_before",
        ),
        (
            {"created_after": "2025-03-01T00:00:00Z", "created_before": "2025-03-01T01:00+01:00"},
            "is not earlier than created_before",
        ),
    ],
)
def test_bad_audit_filters_are_named_and_nothing_is_written(
    app: App, audit_jobs: dict[str, int], params: dict[str, str], fragment: str
) -> None:
    before = table_counts(app)
    response = app.http.get("/v1/jobs", params=params, headers=app.headers)
    assert response.status_code == 422, response.text
    assert fragment in response.json()["detail"]
    assert response.json()["code"]
    assert table_counts(app) == before


def test_listing_with_every_filter_costs_the_same_statements_for_more_jobs(app: App) -> None:
    """No N+1: the statements for one page do not grow with the number of jobs on it."""
    for _ in range(2):
        finish_directly(app, post(app, {**SINGLE_POINT, "reuse": False})["id"])
    query = {
        "package": "ase",
        "package_version": "3.23.0",
        "owner": "ada-admin",
        "state": "succeeded",
        "created_after": "2000-01-01T00:00:00Z",
    }
    statements: list[str] = []

    def count(*args: Any) -> None:
        statements.append(args[2])

    def statements_for() -> int:
        statements.clear()
        event.listen(app.engine, "before_cursor_execute", count)
        try:
            listed(app, query)
        finally:
            event.remove(app.engine, "before_cursor_execute", count)
        return len(statements)

    few = statements_for()
    for _ in range(6):
        finish_directly(app, post(app, {**SINGLE_POINT, "reuse": False})["id"])
    many = statements_for()
    assert len(listed(app, query)) == 8
    assert few == many


def test_package_rows_use_the_normal_name_and_skip_what_was_not_installed() -> None:
    rows = package_rows(7, {"Mace_Torch": "0.3.6", "ase": "3.23.0", "dftd3": "not installed"})
    assert [(r["job_id"], r["package"], r["version"]) for r in rows] == [
        (7, "ase", "3.23.0"),
        (7, "mace-torch", "0.3.6"),
    ]


def test_a_worker_run_records_its_package_versions_with_the_result(app: App) -> None:
    job_id = post(app, SINGLE_POINT)["id"]
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    provenance = app.http.get(f"/v1/jobs/{job_id}/provenance", headers=app.headers).json()
    with Session(app.engine) as session:
        rows = session.exec(select(JobPackage).where(JobPackage.job_id == job_id)).all()
    assert {(r.package, r.version) for r in rows} == set(provenance["packages"].items())
    # The installed ase, read by ASE itself rather than from the record.
    assert listed(app, {"package": "ase", "package_version": ase.__version__}) == [job_id]
    assert listed(app, {"package": "ase", "package_version": ase.__version__ + ".post9"}) == []


# == result reuse ===============================================================================
def test_a_repeat_of_a_succeeded_job_is_answered_at_once_with_its_result(
    app: App, sent: list[int]
) -> None:
    original = post(app, SINGLE_POINT)["id"]
    waiting = post(app, SINGLE_POINT)  # the first has not finished: nothing to reuse yet
    assert (waiting["state"], waiting["reused_from"]) == ("queued", None)
    finish_directly(app, original)
    before = table_counts(app)

    again = post(app, {**SINGLE_POINT, "tags": ["repeat"]})

    assert again["state"] == "succeeded"
    assert again["reused_from"] == original
    assert again["attempts"] == 0
    assert again["tags"] == ["repeat"]
    assert again["started_at"] is not None and again["started_at"] == again["finished_at"]
    assert again["input_hash"] == waiting["input_hash"]
    assert sent == [original, waiting["id"]]  # no message for the reused job
    urls = {job: f"/v1/jobs/{job}" for job in (original, again["id"])}
    results = [app.http.get(f"{url}/result", headers=app.headers) for url in urls.values()]
    assert results[0].json() == results[1].json()
    assert results[0].content == results[1].content
    provenances = [app.http.get(f"{url}/provenance", headers=app.headers) for url in urls.values()]
    # Unchanged: it still names the job and the worker that computed the numbers.
    assert provenances[0].json() == provenances[1].json()
    assert provenances[1].json()["job_id"] == original
    assert provenances[1].json()["host"] == "node-a"
    assert table_counts(app) == {
        "Job": before["Job"] + 1,
        "JobTag": before["JobTag"] + 1,
        "JobResult": before["JobResult"] + 1,
        "JobPackage": before["JobPackage"] + 3,  # the original's rows, copied
    }
    with Session(app.engine) as session:
        row = session.get(Job, again["id"])
        assert row is not None and row.dispatched_at is None and row.worker is None
    assert listed(app, {"package": "ase", "package_version": "3.23.0"}) == [again["id"], original]


def test_reuse_false_queues_and_dispatches_a_fresh_run(app: App, sent: list[int]) -> None:
    original = post(app, SINGLE_POINT)["id"]
    finish_directly(app, original)

    fresh = post(app, {**SINGLE_POINT, "reuse": False})

    assert (fresh["state"], fresh["reused_from"], fresh["attempts"]) == ("queued", None, 0)
    assert sent == [original, fresh["id"]]


def test_the_reconciler_never_sends_a_reused_job(app: App, sent: list[int]) -> None:
    original = post(app, SINGLE_POINT)["id"]
    finish_directly(app, original)
    reused = post(app, SINGLE_POINT)["id"]
    queued = post(app, {**SINGLE_POINT, "reuse": False})["id"]
    reconciler = RecordingDispatcher()

    reconcile_once(app.engine, reconciler, app.settings)

    # With the broker reported emptied every queued job is re-sent; the reused one is not.
    assert reconciler.sent == [queued]
    assert reused not in sent


@pytest.mark.parametrize("state", ["failed", "cancelled"])
def test_a_job_that_did_not_succeed_is_not_reused(app: App, state: str) -> None:
    original = post(app, SINGLE_POINT)["id"]
    finish_directly(app, original, state=state)

    again = post(app, SINGLE_POINT)

    assert (again["state"], again["reused_from"]) == ("queued", None)


def test_a_different_seed_or_calculator_version_is_not_reused(app: App) -> None:
    seeded = post(app, SHORT_MD)["id"]
    finish_directly(app, seeded, result={"made-up": "MD result, not fetched"})
    with transaction(app.engine) as session:
        register(session, name="emt", version="2", backend="emt", elements=["Cu"])
    other_seed = {**SHORT_MD, "task": {**SHORT_MD["task"], "seed": 8}}
    no_seed = {**SHORT_MD, "task": {k: v for k, v in SHORT_MD["task"].items() if k != "seed"}}

    assert post(app, other_seed)["reused_from"] is None
    assert post(app, no_seed)["reused_from"] is None  # the service draws a random seed
    assert post(app, {**SHORT_MD, "calculator": "emt@2"})["reused_from"] is None
    assert post(app, {**SHORT_MD, "calculator": "emt"})["reused_from"] == seeded  # emt@1
    assert post(app, {**SHORT_MD, "calculator": "emt@1"})["reused_from"] == seeded


def test_the_oldest_job_that_ran_is_the_one_reused(app: App) -> None:
    older = post(app, SINGLE_POINT)["id"]
    newer = post(app, {**SINGLE_POINT, "reuse": False})["id"]
    finish_directly(app, newer)
    finish_directly(app, older)

    first = post(app, SINGLE_POINT)
    second = post(app, SINGLE_POINT)

    assert first["reused_from"] == older
    assert second["reused_from"] == older  # never a copy of a copy


def test_converged_false_is_carried_over(app: App) -> None:
    relax = {**SINGLE_POINT, "task": {"kind": "relax", "fmax": 0.01, "max_steps": 2}}
    original = post(app, relax)["id"]
    finish_directly(app, original, converged=False, result={"made-up": "relax result"})
    again = post(app, relax)
    assert (again["reused_from"], again["converged"]) == (original, False)


def test_an_idempotent_retry_of_a_reused_submission_returns_the_same_job(app: App) -> None:
    finish_directly(app, post(app, SINGLE_POINT)["id"])
    headers = {**app.headers, "Idempotency-Key": "tern-retry-1"}
    first = post(app, SINGLE_POINT, headers)
    before = table_counts(app)

    retry = post(app, SINGLE_POINT, headers)
    other = app.http.post("/v1/jobs", json={**SINGLE_POINT, "reuse": False}, headers=headers)

    assert retry == first
    assert other.status_code == 422 and other.json()["code"] == "idempotency_key_reused"
    assert table_counts(app) == before


def test_reuse_is_answered_even_at_the_queued_limit(tmp_path: Any) -> None:
    settings = Settings(data_dir=tmp_path / "data", broker_url="memory://", max_queued_per_user=1)
    with TestClient(create_app(settings)) as client:
        app = App(client, settings)
        finish_directly(app, post(app, SINGLE_POINT)["id"])
        post(app, {**SINGLE_POINT, "reuse": False})  # the one job the limit allows

        reused = post(app, SINGLE_POINT)
        refused = app.http.post(
            "/v1/jobs", json={**SINGLE_POINT, "reuse": False}, headers=app.headers
        )

    assert reused["state"] == "succeeded"
    assert refused.status_code == 429 and refused.json()["code"] == "too_many_queued"


def test_a_reused_md_job_gives_the_original_trajectory_and_lineage(app: App) -> None:
    original = post(app, SHORT_MD)["id"]
    assert run_job(app.engine, original, app.settings).state == "succeeded"

    again = post(app, SHORT_MD)

    assert again["reused_from"] == original
    artifacts = [
        app.http.get(f"/v1/jobs/{job}/artifacts", headers=app.headers).json()
        for job in (original, again["id"])
    ]
    assert [a["name"] for a in artifacts[1]] == ["trajectory.extxyz", "thermo.csv"]
    assert artifacts[1] == artifacts[0]
    trajectory = app.http.get(f"/v1/artifacts/{artifacts[1][0]['id']}", headers=app.headers)
    assert hashlib.sha256(trajectory.content).hexdigest() == artifacts[1][0]["sha256"]
    lineage = app.http.get(f"/v1/jobs/{again['id']}/lineage", headers=app.headers)
    assert lineage.status_code == 200
    assert [record["job_id"] for record in lineage.json()] == [original]
    prov = app.http.get(f"/v1/jobs/{again['id']}/prov-json", headers=app.headers).json()
    assert f"atomq:job-{original}-result" in prov["entity"]


def test_a_reused_neb_keeps_its_parents_in_lineage(app: App) -> None:
    shifted = {**CU_DIMER, "positions": [[0.0, 0.0, 0.0], [2.6, 0.0, 0.0]]}
    ends = [post(app, SINGLE_POINT)["id"], post(app, {**SINGLE_POINT, "structure": shifted})["id"]]
    for end in ends:
        finish_directly(app, end)
    neb = {
        "task": {"kind": "neb", "initial": {"job": ends[0]}, "final": {"job": ends[1]}},
        "calculator": "emt",
    }
    original = post(app, neb)
    finish_directly(app, original["id"], result={"made-up": "NEB result, not fetched"})

    again = post(app, neb)

    assert again["reused_from"] == original["id"]
    assert again["parents"] == ends
    lineage = app.http.get(f"/v1/jobs/{again['id']}/lineage", headers=app.headers).json()
    assert [record["job_id"] for record in lineage] == [original["id"], *ends]


# == the notebook client and the command line over the in-process app ========================
@pytest.fixture
def client(app: App) -> Iterator[Client]:
    transport: httpx.BaseTransport = app.http._transport
    with Client(url="http://testserver", token=app.token, transport=transport) as connected:
        yield connected


def cu_dimer() -> Atoms:
    return Structure.model_validate(CU_DIMER).to_atoms()


def test_client_submit_reuses_unless_told_not_to(app: App, client: Client) -> None:
    first = client.submit(cu_dimer(), SinglePoint(), calculator="emt")
    finish_directly(app, first.id)

    reused = client.submit(cu_dimer(), SinglePoint(), calculator="emt")
    fresh = client.submit(cu_dimer(), SinglePoint(), calculator="emt", reuse=False)

    assert reused.info().reused_from == first.id
    assert reused.result().energy == first.result().energy
    assert (fresh.status(), fresh.info().reused_from) == (JobState.queued, None)


def test_client_jobs_takes_the_audit_filters(client: Client, audit_jobs: dict[str, int]) -> None:
    def ids(**filters: Any) -> list[int]:
        return [job.id for job in client.jobs(**filters).items]

    assert ids(weights_sha256=WEIGHTS) == [3, 2]
    assert ids(package="sevenn", package_version="0.10.1") == [2]
    assert ids(created_after=datetime(2025, 3, 10, tzinfo=UTC)) == [5, 4, 3]
    assert ids(
        created_after=datetime(2025, 2, 1, tzinfo=UTC),
        created_before=datetime(2025, 4, 10, tzinfo=UTC),
    ) == [3, 2]
    with pytest.raises(InvalidRequest, match="created_before 2025-04-10T00:00:00 has no timezone"):
        client.jobs(created_before=datetime(2025, 4, 10))  # naive on purpose


def run_cli(
    app: App, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], *argv: str
) -> tuple[int, str, str]:
    transport: httpx.BaseTransport = app.http._transport
    monkeypatch.setattr(
        "atomq.cli._client",
        lambda _args: Client(url="http://testserver", token=app.token, transport=transport),
    )
    code = atomq_main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def job_ids(table: str) -> list[int]:
    return [int(line.split()[0]) for line in table.splitlines() if line.split()[0].isdigit()]


def test_cli_jobs_filters_and_reuse_notes(
    app: App,
    audit_jobs: dict[str, int],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    def jobs(*options: str) -> list[int]:
        code, out, err = run_cli(app, monkeypatch, capsys, "jobs", *options)
        assert code == 0, err
        return job_ids(out)

    assert jobs("--weights-sha256", WEIGHTS) == [3, 2]
    assert jobs("--package", "ase==3.23.0") == [5, 2, 1]
    assert jobs("--package", "sevenn") == [3, 2]
    # A date without a zone is UTC: 2025-02-10 is the instant job 2 was created.
    assert jobs("--since", "2025-02-10", "--until", "2025-04-10") == [3, 2]
    assert jobs("--since", "2025-02-10T01:00+01:00", "--package", "ase") == [5, 3, 2]

    reused = post(app, {**SINGLE_POINT, "calculator": "emt@1"})
    assert reused["reused_from"] == 1
    code, out, _ = run_cli(app, monkeypatch, capsys, "jobs", "--state", "succeeded")
    rows = {line.split()[0]: line for line in out.splitlines()}
    assert rows[str(reused["id"])].endswith("reused from job 1")
    assert "reused" not in rows["1"]
    code, out, err = run_cli(app, monkeypatch, capsys, "show", str(reused["id"]))
    assert code == 0
    assert f"job {reused['id']}: reused from job 1" in err
    shown = json.loads(out)  # stdout stays JSON
    assert shown["job"]["reused_from"] == 1
    assert shown["provenance"]["job_id"] == 1


@pytest.mark.parametrize(
    ("options", "message"),
    [
        (("--since", "last tuesday"), "is not an ISO 8601 date or time"),
        (("--package", "ase=="), "give a version after =="),
    ],
)
def test_cli_jobs_refuses_bad_options_by_name(
    app: App,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
    options: tuple[str, ...],
    message: str,
) -> None:
    with pytest.raises(SystemExit) as exited:
        run_cli(app, monkeypatch, capsys, "jobs", *options)
    # argparse prints its refusal and exits 2; the command's own check exits with the text.
    assert message in capsys.readouterr().err + str(exited.value.code)


def test_cli_submit_fresh_computes_again(
    app: App, tmp_path: Any, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    cu_dimer().write(tmp_path / "dimer.extxyz")
    finish_directly(app, post(app, SINGLE_POINT)["id"])
    path = str(tmp_path / "dimer.extxyz")

    code, reused, _ = run_cli(app, monkeypatch, capsys, "submit", path, "--calculator", "emt")
    assert code == 0
    code, fresh, _ = run_cli(
        app, monkeypatch, capsys, "submit", path, "--calculator", "emt", "--fresh"
    )
    assert code == 0

    with Session(app.engine) as session:
        rows = {
            row.id: row
            for row in session.exec(
                select(Job).where(col(Job.id).in_([int(reused), int(fresh)]))
            ).all()
        }
    assert rows[int(reused)].reused_from == 1
    assert (rows[int(fresh)].state, rows[int(fresh)].reused_from) == ("queued", None)
