"""Model-swap reports in-process: refusals that name the problem and write nothing, the
candidate jobs a comparison records and dispatches, and the report's numbers against ASE
run directly (tests/model_swap.py).

Jobs run in this process with the worker's own code (`run_job`); the dispatcher is
replaced by a recorder, so the test sees exactly which jobs were sent to workers.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import httpx
import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk
from fastapi.testclient import TestClient
from sqlalchemy import Engine, inspect, text
from sqlmodel import Session, col, select

from atomq import MD, CellRelax, Client, InvalidRequest, JobState, Relax, SinglePoint, Structure
from atomq.comparisons import METRICS, Comparison, ComparisonPublic
from atomq_service.app import create_app
from atomq_service.db import transaction
from atomq_service.demo import demo_structures
from atomq_service.models import Job, JobTag
from atomq_service.registry import register
from atomq_service.settings import Settings
from atomq_workers.execute import run_job
from tests.conftest import App
from tests.model_swap import (
    EMT_ASAP,
    assert_summary_matches_rows,
    emt,
    npt_window_means,
    relax_cell,
    single_point,
)


@dataclass
class RecordingDispatcher:
    """Stands in for the broker: records each wake-up call instead of sending it."""

    sent: list[tuple[int, str]] = field(default_factory=list)

    def send(self, job_id: int, calculator_ref: str) -> bool:
        self.sent.append((job_id, calculator_ref))
        return True

    def close(self) -> None:
        pass


@dataclass
class Lab:
    app: App
    dispatcher: RecordingDispatcher

    @property
    def http(self) -> TestClient:
        return self.app.http

    @property
    def engine(self) -> Engine:
        return self.app.engine

    def submit(self, atoms: Atoms, task: Any, tags: list[str], calculator: str = "emt@1") -> int:
        body = {
            "structure": Structure.from_atoms(atoms).model_dump(mode="json"),
            "task": task.model_dump(mode="json"),
            "calculator": calculator,
            "tags": tags,
            "reuse": False,  # each test's baselines are its own, computed here
        }
        response = self.http.post("/v1/jobs", json=body, headers=self.app.headers)
        assert response.status_code == 201, response.text
        job_id: int = response.json()["id"]
        return job_id

    def run(self, job_id: int) -> None:
        assert run_job(self.engine, job_id, self.app.settings).state == "succeeded"

    def client(self) -> Client:
        transport: httpx.BaseTransport = self.http._transport
        return Client(url="http://testserver", token=self.app.token, transport=transport)


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Lab]:
    settings = Settings(
        data_dir=tmp_path_factory.mktemp("comparisons") / "data",
        broker_url="memory://",
        reconcile_interval_s=0,
    )
    with TestClient(create_app(settings)) as http:
        app = App(http, settings)
        dispatcher = RecordingDispatcher()
        http.app.state.dispatcher = dispatcher  # type: ignore[attr-defined]
        with transaction(app.engine) as session:
            register(session, **EMT_ASAP)
        yield Lab(app, dispatcher)


def row_counts(engine: Engine) -> dict[str, int]:
    with engine.connect() as connection:
        return {
            table: connection.execute(text(f'SELECT count(*) FROM "{table}"')).scalar_one()
            for table in inspect(engine).get_table_names()
        }


def cu_cell() -> Atoms:
    # Fcc Cu near its lattice constant, a = 3.615 Angstrom (Kittel; recalled from memory).
    return bulk("Cu", "fcc", a=3.615, cubic=True)


def ni_cell() -> Atoms:
    # Fcc Ni, a = 3.524 Angstrom (Kittel; recalled from memory).
    return bulk("Ni", "fcc", a=3.524, cubic=True)


# -- refusals: each names the problem, and nothing is written ------------------------------
@dataclass
class Prepared:
    cu: int  # succeeded, tag swap-refusals
    ni: int  # succeeded, tag swap-refusals, a later id than cu
    queued: int  # never run, tag swap-unfinished (beside a copy of cu that succeeded)


@pytest.fixture(scope="module")
def prepared(lab: Lab) -> Prepared:
    cu = lab.submit(cu_cell(), SinglePoint(), ["swap-refusals"])
    ni = lab.submit(ni_cell(), SinglePoint(), ["swap-refusals"])
    done = lab.submit(cu_cell(), SinglePoint(), ["swap-unfinished"])
    for job_id in (cu, ni, done):
        lab.run(job_id)
    queued = lab.submit(ni_cell(), Relax(), ["swap-unfinished"])
    return Prepared(cu, ni, queued)


REFUSALS: dict[str, tuple[Any, str, str]] = {
    # name: (body from the prepared jobs, code, words the refusal must contain)
    "unknown tag": (
        lambda p: {"tag": "no-such-study", "calculator": "emt@2"},
        "empty_selection",
        "no job matches tag 'no-such-study'",
    ),
    "unknown job id": (
        lambda p: {"job_ids": [p.cu, 999_999], "calculator": "emt@2"},
        "unknown_jobs",
        "no jobs with ids 999999",
    ),
    "unfinished job": (
        lambda p: {"tag": "swap-unfinished", "calculator": "emt@2"},
        "baseline_not_succeeded",
        "job {queued} is queued",
    ),
    "element the candidate does not cover": (
        # Cu is covered, Ni is not: the Cu job's rerun is created first, then undone.
        lambda p: {"tag": "swap-refusals", "calculator": "morse-cu@1"},
        "element_not_covered",
        "job {ni} (single_point of Ni4) cannot be rerun with morse-cu@1",
    ),
    "unknown calculator": (
        lambda p: {"tag": "swap-refusals", "calculator": "emt@9"},
        "unknown_calculator",
        "has no version '9'",
    ),
    "unknown calculator name": (
        lambda p: {"tag": "swap-refusals", "calculator": "no-such-model"},
        "unknown_calculator",
        "unknown calculator 'no-such-model'",
    ),
    "the baseline's own calculator": (
        lambda p: {"tag": "swap-refusals", "calculator": "emt@1"},
        "same_calculator",
        "already ran with emt@1",
    ),
    "no job run with the baseline calculator": (
        lambda p: {
            "tag": "swap-refusals",
            "baseline_calculator": "lj-argon",
            "calculator": "emt@2",
        },
        "empty_selection",
        "run with lj-argon",
    ),
    "both a tag and job ids": (
        lambda p: {"tag": "swap-refusals", "job_ids": [p.cu], "calculator": "emt@2"},
        "invalid_input",
        "either `tag` or `job_ids`",
    ),
    "neither a tag nor job ids": (
        lambda p: {"calculator": "emt@2"},
        "invalid_input",
        "either `tag` or `job_ids`",
    ),
}


@pytest.mark.parametrize("case", REFUSALS.values(), ids=REFUSALS.keys())
def test_a_bad_comparison_is_refused_by_name_and_writes_nothing(
    lab: Lab, prepared: Prepared, case: tuple[Any, str, str]
) -> None:
    make_body, code, words = case
    before = row_counts(lab.engine)
    sent_before = len(lab.dispatcher.sent)

    response = lab.http.post("/v1/comparisons", json=make_body(prepared), headers=lab.app.headers)

    assert response.status_code == 422, response.text
    assert response.json()["code"] == code
    assert words.format(**vars(prepared)) in response.json()["detail"]
    assert row_counts(lab.engine) == before
    assert len(lab.dispatcher.sent) == sent_before


def test_the_client_raises_the_refusal_with_the_service_message(
    lab: Lab, prepared: Prepared
) -> None:
    with lab.client() as client, pytest.raises(InvalidRequest) as caught:
        client.compare("emt@2", tag="swap-unfinished")
    assert caught.value.code == "baseline_not_succeeded"
    assert f"job {prepared.queued} is queued" in caught.value.message


def test_an_unknown_comparison_is_404(lab: Lab) -> None:
    response = lab.http.get("/v1/comparisons/424242", headers=lab.app.headers)
    assert response.status_code == 404
    assert response.json()["detail"] == "no comparison with id 424242"


# -- a comparison from start to finish ------------------------------------------------------
NPT = MD(ensemble="npt", temperature_K=300, timestep_fs=2.0, steps=40, thermo_interval=5,
         frame_interval=20, seed=20_260_101)  # fmt: skip


def brackenfield_set() -> dict[str, tuple[Atoms, Any]]:
    """From the demo study of the (made-up) Brackenfield alloy group: the Cu lattice
    relaxation and the rattled Cu50Ni25Al25 single point; plus a short NPT run of the
    Cu75Ni25 cell."""
    demo = {label: (atoms, task) for label, atoms, task in demo_structures()}
    alloy, _ = demo["Cu75Ni25 random alloy, single point"]
    return {
        "relax": demo["Cu fcc lattice"],
        "single_point": demo["Cu50Ni25Al25 random alloy, single point"],
        "md": (alloy, NPT),
    }


def test_a_comparison_reruns_each_job_and_reports_what_ase_gives(lab: Lab) -> None:
    work = brackenfield_set()
    baselines = {
        kind: lab.submit(atoms, task, ["brackenfield-swap"]) for kind, (atoms, task) in work.items()
    }
    for job_id in baselines.values():
        lab.run(job_id)
    lab.dispatcher.sent.clear()

    with lab.client() as client:
        comparison = client.compare("emt@2", tag="brackenfield-swap", tags=["upgrade-check"])
        first = comparison.report()

        # Recorded, not computed yet: every row queued, no deltas, nothing to summarise.
        assert not first.complete
        assert first.calculator == "emt@2"
        assert first.selection == "3 jobs by tag brackenfield-swap"
        assert [row.baseline_job for row in first.rows] == sorted(baselines.values())
        assert {row.state for row in first.rows} == {JobState.queued}
        assert all(getattr(row, m) is None for row in first.rows for m in METRICS)
        assert all(stats.count == 0 for stats in first.summary.values())
        candidates = {row.baseline_job: row.candidate_job for row in first.rows}
        # Each rerun went to the candidate's queue, once, after the commit.
        assert sorted(lab.dispatcher.sent) == sorted((c, "emt@2") for c in candidates.values())
        check_candidate_jobs(lab.engine, candidates, first.tag)

        for candidate in candidates.values():
            lab.run(candidate)
        report = comparison.wait(timeout=30)
        frame = comparison.dataframe()
        lineage = client.job(candidates[baselines["relax"]]).lineage()

    assert report.complete
    rows = {row.kind: row for row in report.rows}
    assert {row.state for row in report.rows} == {JobState.succeeded}
    check_against_ase(work, rows)
    assert_summary_matches_rows(report)
    # The lineage of a rerun reaches the job it reran.
    assert [p.job_id for p in lineage] == [candidates[baselines["relax"]], baselines["relax"]]
    # The DataFrame holds the report's rows, value for value (NaN where a row has none).
    assert list(frame["candidate_job"]) == [row.candidate_job for row in report.rows]
    for metric in METRICS:
        expected = [np.nan if (v := getattr(r, metric)) is None else v for r in report.rows]
        np.testing.assert_array_equal(frame[metric].to_numpy(dtype=float), expected)


def check_candidate_jobs(engine: Engine, candidates: dict[int, int], tag: str) -> None:
    """Each rerun is the baseline's structure and task (the MD seed too) under emt@2, tagged,
    with the baseline as its parent."""
    with Session(engine) as session:
        for baseline_id, candidate_id in candidates.items():
            baseline, candidate = session.get(Job, baseline_id), session.get(Job, candidate_id)
            assert baseline is not None and candidate is not None
            assert candidate.calculator_ref == "emt@2"
            assert candidate.structure == baseline.structure
            assert candidate.task == baseline.task
            assert candidate.seed == baseline.seed
            assert candidate.parents == [baseline_id]
            assert candidate.dispatched_at is not None
        tagged = session.exec(
            select(JobTag.job_id, JobTag.tag).where(col(JobTag.tag).in_([tag, "upgrade-check"]))
        ).all()
    assert sorted(tagged) == sorted(
        (c, t) for c in candidates.values() for t in (tag, "upgrade-check")
    )


def check_against_ase(work: dict[str, tuple[Atoms, Any]], rows: dict[str, Any]) -> None:
    """Every delta against the same calculations run here with ASE and both EMT versions.
    EMT is deterministic float64 and the workers reproduce ASE bit for bit, so only the
    order of the arithmetic in a delta may differ: 1e-12 in eV/atom, eV/A or percent is
    eight orders of magnitude below the deltas themselves."""
    tight = {"rel": 0, "abs": 1e-12}

    atoms, _ = work["single_point"]
    (e1, f1), (e2, f2) = single_point(atoms, emt("1")), single_point(atoms, emt("2"))
    row = rows["single_point"]
    assert row.delta_energy_per_atom_eV == pytest.approx((e2 - e1) / len(atoms), **tight)
    assert row.max_force_delta_eV_per_A == pytest.approx(
        np.linalg.norm(f2 - f1, axis=1).max(), **tight
    )
    assert abs(row.delta_energy_per_atom_eV) > 1e-6  # the two versions do differ
    assert row.volume_change_percent is None and row.barrier_change_eV is None

    atoms, task = work["relax"]
    before = relax_cell(atoms, emt("1"), fmax=task.fmax)
    after = relax_cell(atoms, emt("2"), fmax=task.fmax)
    row = rows["relax"]
    assert row.baseline_converged and row.candidate_converged
    per_atom = (after.get_potential_energy() - before.get_potential_energy()) / len(atoms)
    assert row.delta_energy_per_atom_eV == pytest.approx(per_atom, **tight)
    volume = 100 * (after.get_volume() / before.get_volume() - 1)
    assert row.volume_change_percent == pytest.approx(volume, **tight)
    lengths = 100 * (after.cell.lengths() / before.cell.lengths() - 1)
    assert [
        row.lattice_a_change_percent,
        row.lattice_b_change_percent,
        row.lattice_c_change_percent,
    ] == pytest.approx(list(lengths), **tight)
    assert abs(volume) > 1e-6 and row.max_force_delta_eV_per_A is None

    atoms, task = work["md"]
    runs = [
        npt_window_means(
            atoms,
            emt(version),
            seed=task.seed,
            temperature_K=task.temperature_K,
            timestep_fs=task.timestep_fs,
            steps=task.steps,
            interval=task.thermo_interval,
        )
        for version in ("1", "2")
    ]
    row = rows["md"]
    assert row.delta_energy_per_atom_eV == pytest.approx(
        (runs[1][0] - runs[0][0]) / len(atoms), **tight
    )
    assert row.volume_change_percent == pytest.approx(100 * (runs[1][1] / runs[0][1] - 1), **tight)
    lengths = 100 * (runs[1][2] / runs[0][2] - 1)
    assert [
        row.lattice_a_change_percent,
        row.lattice_b_change_percent,
        row.lattice_c_change_percent,
    ] == pytest.approx(list(lengths), **tight)
    assert row.max_force_delta_eV_per_A is None  # the trajectories differ: no common positions


def test_a_second_comparison_takes_identical_results_and_sends_nothing(lab: Lab) -> None:
    """An identical rerun is answered from the earlier result (the service's reuse by input
    hash): such a job is finished at once and must not be sent to a worker."""
    cu = lab.submit(cu_cell(), SinglePoint(), ["swap-twice"])
    lab.run(cu)
    with lab.client() as client:
        first = client.compare("emt@2", tag="swap-twice")
        lab.run(first.report().rows[0].candidate_job)
        first_report = first.wait(timeout=30)
        lab.dispatcher.sent.clear()

        second = client.compare("emt@2", tag="swap-twice").report()
        fresh = client.compare("emt@2", tag="swap-twice", reuse=False).report()

    assert second.complete and second.rows[0].state is JobState.succeeded
    assert second.rows[0].delta_energy_per_atom_eV == first_report.rows[0].delta_energy_per_atom_eV
    assert not fresh.complete
    assert lab.dispatcher.sent == [(fresh.rows[0].candidate_job, "emt@2")]


def test_a_retried_request_with_the_same_key_returns_the_same_comparison(lab: Lab) -> None:
    cu = lab.submit(cu_cell(), SinglePoint(), ["swap-retry"])
    lab.run(cu)
    body = {"tag": "swap-retry", "calculator": "emt@2", "reuse": False}
    headers = {**lab.app.headers, "Idempotency-Key": "swap-retry-1"}

    first = lab.http.post("/v1/comparisons", json=body, headers=headers)
    counts = row_counts(lab.engine)
    again = lab.http.post("/v1/comparisons", json=body, headers=headers)
    other = lab.http.post("/v1/comparisons", json={**body, "tags": ["x"]}, headers=headers)

    assert first.status_code == again.status_code == 201
    assert ComparisonPublic.model_validate(again.json()).id == first.json()["id"]
    assert row_counts(lab.engine) == counts
    assert other.status_code == 422 and other.json()["code"] == "idempotency_key_reused"


def test_a_failed_rerun_shows_its_state_and_error_and_no_deltas(lab: Lab) -> None:
    """A rerun that ends failed leaves its row without numbers, and the report complete."""
    cu = lab.submit(cu_cell(), Relax(fmax=0.01, cell=CellRelax()), ["swap-fails"])
    lab.run(cu)
    with lab.client() as client:
        comparison = client.compare("emt@2", tag="swap-fails", time_limit_s=1e-6)
        candidate = comparison.report().rows[0].candidate_job
        run_job(lab.engine, candidate, lab.app.settings)
        report = comparison.wait(timeout=30)
    row = report.rows[0]
    assert report.complete and row.state is JobState.failed
    assert row.error is not None and "time_limit" in row.error
    assert all(getattr(row, m) is None for m in METRICS)
    assert report.summary["delta_energy_per_atom_eV"].count == 0


def test_dataframe_without_pandas_says_how_to_get_it(
    lab: Lab, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "pandas", None)  # what an absent package looks like
    report = ComparisonPublic(
        id=1,
        owner="ada-admin",
        calculator="emt@2",
        selection="1 jobs by job ids",
        tag="comparison-1",
        created_at=datetime.now(UTC),
        complete=True,
        rows=[],
        summary={},
    )
    with lab.client() as client, pytest.raises(ImportError, match="pip install pandas"):
        Comparison(client, 1, report).dataframe()
