"""Waiting on the service: /wait answers when the job ends, or after its timeout."""

from __future__ import annotations

import threading
import time

from atomq_workers.execute import run_job
from tests.api.bodies import SINGLE_POINT
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
