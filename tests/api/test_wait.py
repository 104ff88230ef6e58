"""Waiting on the service: /wait answers when the job (or the batch's last job) ends, or
after its timeout."""

from __future__ import annotations

import threading
import time

from atomq_workers.execute import run_job
from tests.api.bodies import SINGLE_POINT
from tests.api.test_batches_api import body, cells
from tests.conftest import App


def submit(app: App) -> int:
    response = app.http.post("/v1/jobs", json={**SINGLE_POINT, "reuse": False}, headers=app.headers)
    assert response.status_code == 201, response.text
    job_id: int = response.json()["id"]
    return job_id


def test_a_queued_job_is_answered_after_the_timeout_as_it_is(app: App) -> None:
    job_id = submit(app)
    started = time.monotonic()
    waited = app.http.get(f"/v1/jobs/{job_id}/wait", params={"timeout_s": 0.3}, headers=app.headers)
    assert waited.status_code == 200 and waited.json()["state"] == "queued"
    assert time.monotonic() - started >= 0.3  # it did hold the request


def test_the_answer_comes_when_the_job_ends(app: App) -> None:
    job_id = submit(app)
    runner = threading.Timer(0.2, run_job, args=(app.engine, job_id, app.settings))
    runner.start()
    waited = app.http.get(f"/v1/jobs/{job_id}/wait", params={"timeout_s": 30}, headers=app.headers)
    runner.join()
    assert waited.status_code == 200 and waited.json()["state"] == "succeeded"


def test_bad_timeouts_and_unknown_jobs_are_refused(app: App) -> None:
    job_id = submit(app)
    for timeout in (-1, 61, "soon"):
        refused = app.http.get(
            f"/v1/jobs/{job_id}/wait", params={"timeout_s": timeout}, headers=app.headers
        )
        assert refused.status_code == 422, timeout
    missing = app.http.get("/v1/jobs/999999/wait", headers=app.headers)
    assert missing.status_code == 404 and "no job with id 999999" in missing.json()["detail"]


def test_a_batch_is_answered_when_its_last_job_ends(app: App) -> None:
    structures = cells(3, seed=7)
    created = app.http.post("/v1/batches", json=body(structures), headers=app.headers)
    assert created.status_code == 201, created.text
    batch_id, job_ids = created.json()["id"], created.json()["job_ids"]
    for job_id in job_ids[:2]:
        run_job(app.engine, job_id, app.settings)
    started = time.monotonic()
    waited = app.http.get(
        f"/v1/batches/{batch_id}/wait", params={"timeout_s": 0.3}, headers=app.headers
    )
    assert time.monotonic() - started >= 0.3  # one job was still queued: it held on
    assert waited.status_code == 200 and waited.json()["finished"] is False
    assert waited.json()["counts"] == {"succeeded": 2, "queued": 1}

    runner = threading.Timer(0.2, run_job, args=(app.engine, job_ids[2], app.settings))
    runner.start()
    waited = app.http.get(
        f"/v1/batches/{batch_id}/wait", params={"timeout_s": 30}, headers=app.headers
    )
    runner.join()
    assert waited.status_code == 200 and waited.json()["finished"] is True
    assert waited.json()["counts"] == {"succeeded": 3}
    missing = app.http.get("/v1/batches/999999/wait", headers=app.headers)
    assert missing.status_code == 404 and "no batch with id 999999" in missing.json()["detail"]


def test_the_result_route_waits_for_the_job_when_asked(app: App) -> None:
    job_id = submit(app)
    started = time.monotonic()
    early = app.http.get(f"/v1/jobs/{job_id}/result", params={"wait_s": 0.3}, headers=app.headers)
    assert time.monotonic() - started >= 0.3  # it held on for the job first
    assert early.status_code == 409 and early.json()["code"] == "no_result"
    assert f"job {job_id} is queued" in early.json()["detail"]

    runner = threading.Timer(0.2, run_job, args=(app.engine, job_id, app.settings))
    runner.start()
    answered = app.http.get(f"/v1/jobs/{job_id}/result", params={"wait_s": 30}, headers=app.headers)
    runner.join()
    assert answered.status_code == 200, answered.text
    assert answered.json()["kind"] == "single_point" and len(answered.json()["forces"]) == 2
    for wait_s in (-1, 61, "soon"):
        refused = app.http.get(
            f"/v1/jobs/{job_id}/result", params={"wait_s": wait_s}, headers=app.headers
        )
        assert refused.status_code == 422, wait_s
