"""Limits that protect the shared service: request body size, requests per minute per
token, jobs queued per user; and Idempotency-Key, which makes a retried submission safe.

Each test builds an app with small limits of its own; every refusal must name the limit
(its value and the ATOMQ_* setting) and write nothing.
"""

from __future__ import annotations

import asyncio
import itertools
import json
from collections.abc import Callable, Iterator
from contextlib import ExitStack
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlmodel import Session, col, select

from atomq_service.api import limits
from atomq_service.api.limits import RateLimit
from atomq_service.app import create_app
from atomq_service.models import Job
from atomq_service.settings import Settings
from tests.api.bodies import SINGLE_POINT
from tests.conftest import App

MakeApp = Callable[..., App]


@pytest.fixture
def make_app(tmp_path: Path) -> Iterator[MakeApp]:
    """An app with the given Settings fields, over a fresh SQLite file."""
    numbers = itertools.count()
    with ExitStack() as stack:

        def make(**overrides: Any) -> App:
            settings = Settings(
                data_dir=tmp_path / f"data-{next(numbers)}",
                broker_url="memory://",
                reconcile_interval_s=0,
                **overrides,
            )
            client = stack.enter_context(TestClient(create_app(settings)))
            return App(client, settings)

        yield make


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def padded(body: dict[str, Any], size: int) -> bytes:
    """The JSON text of `body`, padded with insignificant whitespace to exactly `size`."""
    text = json.dumps(body).encode()
    assert len(text) <= size
    return text[:-1] + b" " * (size - len(text)) + b"}"


def in_chunks(data: bytes, chunk: int = 1000) -> Iterator[bytes]:
    for start in range(0, len(data), chunk):
        yield data[start : start + chunk]


def post_raw(app: App, content: Any, headers: dict[str, str] | None = None) -> Any:
    return app.http.post(
        "/v1/jobs",
        content=content,
        headers={**(headers or app.headers), "Content-Type": "application/json"},
    )


def assert_names_the_body_limit(response: Any, limit: int) -> None:
    assert response.status_code == 413, response.text
    refusal = response.json()
    assert refusal["code"] == "body_too_large"
    assert f"request body over {limit} bytes (ATOMQ_MAX_BODY_BYTES)" in refusal["detail"]


# -- body size ---------------------------------------------------------------------------
LIMIT = 4096


def test_a_body_at_the_limit_is_accepted(make_app: MakeApp) -> None:
    app = make_app(max_body_bytes=LIMIT)
    response = post_raw(app, padded(SINGLE_POINT, LIMIT))
    assert response.status_code == 201, response.text


def test_a_declared_body_over_the_limit_is_413_and_writes_nothing(make_app: MakeApp) -> None:
    app = make_app(max_body_bytes=LIMIT)
    before = app.counts()

    response = post_raw(app, padded(SINGLE_POINT, LIMIT + 1))

    assert response.request.headers["content-length"] == str(LIMIT + 1)
    assert_names_the_body_limit(response, LIMIT)
    assert app.counts() == before


def test_a_streamed_body_under_the_limit_is_accepted(make_app: MakeApp) -> None:
    """The positive control for the streamed case: chunked bodies work as such."""
    app = make_app(max_body_bytes=LIMIT)
    response = post_raw(app, in_chunks(padded(SINGLE_POINT, LIMIT)))
    assert response.request.headers["transfer-encoding"] == "chunked"
    assert response.status_code == 201, response.text


def test_a_streamed_body_over_the_limit_is_refused_and_writes_nothing(
    make_app: MakeApp,
) -> None:
    app = make_app(max_body_bytes=LIMIT)
    before = app.counts()

    response = post_raw(app, in_chunks(padded(SINGLE_POINT, 3 * LIMIT)))

    assert "content-length" not in response.request.headers
    assert response.request.headers["transfer-encoding"] == "chunked"
    assert 400 <= response.status_code < 500, response.text
    assert app.counts() == before


def test_a_streamed_body_over_the_limit_is_413_naming_the_limit(make_app: MakeApp) -> None:
    app = make_app(max_body_bytes=LIMIT)
    response = post_raw(app, in_chunks(padded(SINGLE_POINT, 3 * LIMIT)))
    assert_names_the_body_limit(response, LIMIT)


# -- requests per minute per token -------------------------------------------------------
def test_requests_over_the_rate_are_429_per_token(make_app: MakeApp) -> None:
    app = make_app(requests_per_minute=5)
    mine = bearer(app.token_for("busy-member"))
    other = bearer(app.token_for("calm-member"))
    for _ in range(5):
        assert app.http.get("/v1/me", headers=mine).status_code == 200
    before = app.counts()

    refused = app.http.get("/v1/me", headers=mine)
    refused_submit = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=mine)

    for response in (refused, refused_submit):
        assert response.status_code == 429
        assert response.json()["code"] == "rate_limited"
        assert (
            "more than 5 requests in a minute with this token (ATOMQ_REQUESTS_PER_MINUTE)"
            in response.json()["detail"]
        )
        # Retry-After in whole seconds (RFC 9110 section 10.2.3, recalled from memory);
        # the window is one minute.
        assert 1 <= int(response.headers["retry-after"]) <= 61
    assert app.counts() == before
    assert app.http.get("/v1/me", headers=other).status_code == 200


def test_the_rate_limit_counts_the_token_however_its_scheme_is_spelled(
    make_app: MakeApp,
) -> None:
    app = make_app(requests_per_minute=3)
    token = app.token_for("busy-member")
    for _ in range(3):
        assert app.http.get("/v1/me", headers=bearer(token)).status_code == 200
    assert app.http.get("/v1/me", headers=bearer(token)).status_code == 429

    respelled = app.http.get("/v1/me", headers={"Authorization": f"bearer {token}"})

    assert respelled.status_code == 429


def test_the_rate_limiter_forgets_tokens_whose_window_has_passed(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    now = [0.0]
    monkeypatch.setattr(limits, "time", SimpleNamespace(monotonic=lambda: now[0]))

    async def answer(_scope: Any, _receive: Any, send: Any) -> None:
        await send({"type": "http.response.start", "status": 200, "headers": []})
        await send({"type": "http.response.body", "body": b""})

    limiter = RateLimit(answer, per_minute=5)

    async def request(authorization: bytes) -> None:
        async def discard(_message: Any) -> None:
            return None

        scope = {"type": "http", "headers": [(b"authorization", authorization)]}
        await limiter(scope, discard, discard)

    async def scenario() -> None:
        for i in range(1000):
            await request(f"Bearer made-up-{i}".encode())
        now[0] = 120.0  # two minutes later every one of those windows is empty
        await request(b"Bearer made-up-last")

    asyncio.run(scenario())

    assert len(limiter.recent) <= 1


# -- jobs queued per user ----------------------------------------------------------------
def test_jobs_queued_over_the_limit_are_429_per_user(make_app: MakeApp) -> None:
    app = make_app(max_queued_per_user=2)
    mine = bearer(app.token_for("busy-member"))
    other = bearer(app.token_for("calm-member"))
    first = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=mine).json()["id"]
    assert app.http.post("/v1/jobs", json=SINGLE_POINT, headers=mine).status_code == 201
    before = app.counts()

    refused = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=mine)

    assert refused.status_code == 429
    assert refused.json()["code"] == "too_many_queued"
    assert (
        "you have 2 jobs queued or running; this service allows 2 per user "
        "(ATOMQ_MAX_QUEUED_PER_USER)" in refused.json()["detail"]
    )
    assert app.counts() == before
    # Another user is unaffected; a finished job frees a place.
    assert app.http.post("/v1/jobs", json=SINGLE_POINT, headers=other).status_code == 201
    assert app.http.post(f"/v1/jobs/{first}/cancel", headers=mine).status_code == 200
    assert app.http.post("/v1/jobs", json=SINGLE_POINT, headers=mine).status_code == 201


def test_a_retry_at_the_queue_limit_still_finds_its_job(make_app: MakeApp) -> None:
    """A client that lost the answer to its submission retries; at the limit it must get
    the job it already has, not a refusal."""
    app = make_app(max_queued_per_user=1)
    key = {"Idempotency-Key": "relax-batch-7/item-0"}
    first = app.http.post("/v1/jobs", json=SINGLE_POINT, headers={**app.headers, **key})
    before = app.counts()

    retry = app.http.post("/v1/jobs", json=SINGLE_POINT, headers={**app.headers, **key})

    assert retry.status_code == 201
    assert retry.json()["id"] == first.json()["id"]
    assert app.counts() == before


# -- Idempotency-Key ---------------------------------------------------------------------
def jobs_with_key(app: App, key: str) -> list[int]:
    with Session(app.engine) as session:
        rows = session.exec(select(Job.id).where(Job.idempotency_key == key)).all()
    return sorted(row for row in rows if row is not None)


def test_the_same_key_twice_gives_one_job(make_app: MakeApp) -> None:
    app = make_app()
    headers = {**app.headers, "Idempotency-Key": "alloy-screen-0001"}
    before = app.counts()

    first = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=headers)
    second = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=headers)

    assert first.status_code == second.status_code == 201
    assert second.json() == first.json()
    assert jobs_with_key(app, "alloy-screen-0001") == [first.json()["id"]]
    assert app.counts()["Job"] == before["Job"] + 1


def test_a_different_key_or_no_key_gives_a_new_job(make_app: MakeApp) -> None:
    app = make_app()
    ids = [
        app.http.post("/v1/jobs", json=SINGLE_POINT, headers={**app.headers, **extra}).json()["id"]
        for extra in (
            {"Idempotency-Key": "alloy-screen-0001"},
            {"Idempotency-Key": "alloy-screen-0002"},
            {},
            {},
        )
    ]
    assert len(set(ids)) == 4
    assert app.counts()["Job"] == 4


def test_the_same_key_from_another_user_is_a_separate_job(make_app: MakeApp) -> None:
    app = make_app()
    key = {"Idempotency-Key": "alloy-screen-0001"}
    mine = app.http.post("/v1/jobs", json=SINGLE_POINT, headers={**app.headers, **key})
    other_member = bearer(app.token_for("other-member"))

    theirs = app.http.post("/v1/jobs", json=SINGLE_POINT, headers={**other_member, **key})

    assert theirs.status_code == 201
    assert theirs.json()["id"] != mine.json()["id"]
    assert theirs.json()["owner"] == "other-member"
    assert jobs_with_key(app, "alloy-screen-0001") == sorted(
        [mine.json()["id"], theirs.json()["id"]]
    )


def test_a_refused_submission_leaves_its_key_free(make_app: MakeApp) -> None:
    app = make_app()
    headers = {**app.headers, "Idempotency-Key": "alloy-screen-0003"}
    bad = {**SINGLE_POINT, "calculator": "emtt"}
    assert app.http.post("/v1/jobs", json=bad, headers=headers).status_code == 422

    fixed = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=headers)

    assert fixed.status_code == 201
    assert jobs_with_key(app, "alloy-screen-0003") == [fixed.json()["id"]]


def test_an_overlong_key_is_refused_by_name(make_app: MakeApp) -> None:
    app = make_app()
    before = app.counts()
    response = app.http.post(
        "/v1/jobs", json=SINGLE_POINT, headers={**app.headers, "Idempotency-Key": "k" * 129}
    )
    assert response.status_code == 422
    assert "idempotency-key" in response.json()["detail"]
    assert app.counts() == before


def test_the_same_key_with_a_different_body_is_refused(make_app: MakeApp) -> None:
    app = make_app()
    headers = {**app.headers, "Idempotency-Key": "alloy-screen-0004"}
    assert app.http.post("/v1/jobs", json=SINGLE_POINT, headers=headers).status_code == 201
    before = app.counts()
    relax = {**SINGLE_POINT, "task": {"kind": "relax", "fmax": 0.02}}

    reused = app.http.post("/v1/jobs", json=relax, headers=headers)

    assert reused.status_code in (409, 422), reused.text
    assert "Idempotency-Key" in reused.json()["detail"]
    assert app.counts() == before


def test_queued_count_is_read_from_the_database(make_app: MakeApp) -> None:
    """The per-user limit counts queued and running rows, not requests: jobs that ended
    do not count."""
    app = make_app(max_queued_per_user=1)
    first = app.http.post("/v1/jobs", json=SINGLE_POINT, headers=app.headers).json()["id"]
    with Session(app.engine) as session:
        job = session.exec(select(Job).where(col(Job.id) == first)).one()
        job.state = "succeeded"
        session.add(job)
        session.commit()
    assert app.http.post("/v1/jobs", json=SINGLE_POINT, headers=app.headers).status_code == 201
