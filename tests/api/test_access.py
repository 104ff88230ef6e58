"""Who may do what: every route of the OpenAPI document against every kind of caller, how
tokens are kept, and how calculator backends and artifacts are addressed.

The status codes follow HTTP's own meaning (RFC 9110, sections 15.5.2 and 15.5.4, and
RFC 6750 for bearer tokens; recalled from memory): 401 when the caller could not be
identified (no, unknown, expired or revoked token), 403 when an identified caller may not
do this. The lab's rules on top: members submit jobs and read everything of the lab, but
cancel only their own jobs; users, tokens and calculator versions are for admins.

One app serves the whole module. Each request that changes something (cancel, revoke,
register, retire, create) gets a fresh target of its own, so the cells are independent.
"""

from __future__ import annotations

import hashlib
import io
import itertools
import secrets
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import ase.io
import numpy as np
import pytest
from fastapi.routing import APIRoute
from fastapi.testclient import TestClient
from sqlalchemy import Engine, inspect, text
from sqlmodel import Session, col, select

from atomq_service.api.admin import router as admin_router
from atomq_service.api.batches import router as batches_router
from atomq_service.api.comparisons import router as comparisons_router
from atomq_service.api.routes import public_router
from atomq_service.api.routes import router as jobs_router
from atomq_service.app import create_app
from atomq_service.db import transaction
from atomq_service.models import ApiToken, Artifact, Calculator
from atomq_service.registry import register
from atomq_service.settings import Settings
from atomq_service.users import hash_token, issue_token
from atomq_workers.execute import run_job
from tests.api.bodies import CU_DIMER, SHORT_MD, SINGLE_POINT
from tests.conftest import App


# -- the lab: two members, an admin, and credentials that must not work -------------------
@dataclass
class Lab:
    app: App
    headers: dict[str, dict[str, str]]  # actor -> request headers
    finished_job: int  # owned by the member "owner-member", succeeded, with artifacts
    artifact: int
    fresh: Iterator[int]

    @property
    def http(self) -> TestClient:
        return self.app.http

    @property
    def engine(self) -> Engine:
        return self.app.engine

    def submit(self, actor: str, body: dict[str, Any] = SINGLE_POINT) -> int:
        response = self.http.post("/v1/jobs", json=body, headers=self.headers[actor])
        assert response.status_code == 201, response.text
        job_id: int = response.json()["id"]
        return job_id


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def finished_job_with_artifacts(app: App, headers: dict[str, str]) -> int:
    """Submit a short MD run and execute it in this process with the worker's own code."""
    response = app.http.post("/v1/jobs", json=SHORT_MD, headers=headers)
    assert response.status_code == 201, response.text
    job_id: int = response.json()["id"]
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    return job_id


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Lab]:
    # No reconciler: nothing here needs lost messages re-sent.
    settings = Settings(
        data_dir=tmp_path_factory.mktemp("access") / "data",
        broker_url="memory://",
        reconcile_interval_s=0,
    )
    with TestClient(create_app(settings)) as client:
        app = App(client, settings)
        expired = issue_token(
            app.engine, "ada-admin", expires_at=datetime.now(UTC) - timedelta(hours=1)
        )
        revoked = issue_token(app.engine, "ada-admin")
        with transaction(app.engine) as session:
            row = session.exec(
                select(ApiToken).where(ApiToken.token_sha256 == hash_token(revoked))
            ).one()
            row.revoked = True
            session.add(row)
        # Expired and revoked tokens belong to the admin: even the strongest role's dead
        # credentials must be refused.
        headers = {
            "no token": {},
            "wrong token": bearer("atq_" + secrets.token_urlsafe(32)),
            "expired token": bearer(expired),
            "revoked token": bearer(revoked),
            "owner": bearer(app.token_for("owner-member")),
            "other member": bearer(app.token_for("other-member")),
            "admin": app.headers,
        }
        job_id = finished_job_with_artifacts(app, headers["owner"])
        artifacts = client.get(f"/v1/jobs/{job_id}/artifacts", headers=app.headers).json()
        assert [a["name"] for a in artifacts] == ["trajectory.extxyz", "thermo.csv"]
        yield Lab(app, headers, job_id, artifacts[0]["id"], itertools.count(1))


# -- the matrix ---------------------------------------------------------------------------
ACTORS = (
    "no token",
    "wrong token",
    "expired token",
    "revoked token",
    "owner",  # a member, acting on a job of their own
    "other member",  # a member, acting on the owner's job
    "admin",
)
UNIDENTIFIED = {
    "no token": "missing_token",
    "wrong token": "invalid_token",
    "expired token": "expired_token",
    "revoked token": "revoked_token",
}
DENIED = ("401", "401", "401", "401")
ADMIN_ONLY = "403 admin_only"

# One row per route; one cell per actor, in the order of ACTORS: "status" or "status code".
MATRIX: dict[tuple[str, str], tuple[str, ...]] = {
    ("GET", "/v1/health"): ("200",) * 7,
    ("POST", "/v1/jobs"): (*DENIED, "201", "201", "201"),
    ("GET", "/v1/jobs"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}"): (*DENIED, "200", "200", "200"),
    ("POST", "/v1/jobs/{job_id}/cancel"): (*DENIED, "200", "403 not_your_job", "200"),
    ("GET", "/v1/jobs/{job_id}/result"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/provenance"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/artifacts"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/lineage"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/prov-json"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/prov-json"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/events"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/jobs/{job_id}/wait"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/artifacts/{artifact_id}"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/calculators"): (*DENIED, "200", "200", "200"),
    ("POST", "/v1/calculators"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "201"),
    ("POST", "/v1/calculators/{name}/{version}/retire"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "200"),
    ("GET", "/v1/calculators/{name}/{version}"): (*DENIED, "200", "200", "200"),
    ("PUT", "/v1/defaults/{name}"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "200"),
    ("GET", "/v1/defaults/{name}"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/workers"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/me"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/users"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "200"),
    ("POST", "/v1/users"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "201"),
    ("POST", "/v1/users/{name}/tokens"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "201"),
    ("GET", "/v1/users/{name}/tokens"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "200"),
    ("POST", "/v1/tokens/{token_id}/revoke"): (*DENIED, ADMIN_ONLY, ADMIN_ONLY, "200"),
    ("POST", "/v1/batches"): (*DENIED, "201", "201", "201"),
    ("GET", "/v1/batches/{batch_id}"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/batches/{batch_id}/results"): (*DENIED, "200", "200", "200"),
    ("GET", "/v1/batches/{batch_id}/wait"): (*DENIED, "200", "200", "200"),
    ("POST", "/v1/batches/{batch_id}/cancel"): (*DENIED, "200", "403 not_your_batch", "200"),
    ("POST", "/v1/comparisons"): (*DENIED, "201", "201", "201"),
    ("GET", "/v1/comparisons/{comparison_id}"): (*DENIED, "200", "200", "200"),
}


def prepare(lab: Lab, method: str, route: str) -> tuple[str, dict[str, Any] | None]:
    """The concrete path and JSON body for one cell. What a cell may change is created for
    it alone: a queued job to cancel, a token to revoke, a calculator to retire."""
    n = next(lab.fresh)
    job = lab.finished_job
    if (method, route) == ("POST", "/v1/jobs"):
        return route, SINGLE_POINT
    if route == "/v1/jobs/{job_id}/cancel":
        return f"/v1/jobs/{lab.submit('owner')}/cancel", None
    if route.startswith("/v1/jobs/{job_id}"):
        return route.replace("{job_id}", str(job)), None
    if route == "/v1/artifacts/{artifact_id}":
        return f"/v1/artifacts/{lab.artifact}", None
    if (method, route) == ("POST", "/v1/calculators"):
        return route, {
            "name": f"emt-copy-{n}",
            "version": "1",
            "backend": "emt",
            "elements": ["Cu"],
        }
    if route == "/v1/calculators/{name}/{version}/retire":
        with transaction(lab.engine) as session:
            register(session, name=f"to-retire-{n}", version="1", backend="emt", elements=["Cu"])
        return f"/v1/calculators/to-retire-{n}/1/retire", None
    if route == "/v1/calculators/{name}/{version}":
        return "/v1/calculators/emt/1", None
    if route == "/v1/defaults/{name}":
        return "/v1/defaults/emt", ({"version": "1"} if method == "PUT" else None)
    if route == "/v1/prov-json":
        return f"{route}?tag=screening", None
    if (method, route) == ("POST", "/v1/users"):
        return route, {"name": f"new-member-{n}"}
    if route == "/v1/users/{name}/tokens":
        return "/v1/users/owner-member/tokens", ({} if method == "POST" else None)
    if route == "/v1/tokens/{token_id}/revoke":
        issue_token(lab.engine, "owner-member")
        with Session(lab.engine) as session:
            newest = session.exec(select(ApiToken).order_by(col(ApiToken.id).desc())).first()
            assert newest is not None
        return f"/v1/tokens/{newest.id}/revoke", None
    if route.startswith("/v1/batches"):
        body = {"structures": [CU_DIMER], "task": {"kind": "single_point"}, "calculator": "emt"}
        if method == "POST" and route == "/v1/batches":
            return route, {**body, "reuse": False}
        # A batch of the owner's own, fresh for each cell (a cancelled one stays cancelled).
        created = lab.http.post(
            "/v1/batches", json={**body, "reuse": False}, headers=lab.headers["owner"]
        )
        assert created.status_code == 201, created.text
        path = route.replace("{batch_id}", str(created.json()["id"]))
        # Its job stays queued here: the wait answers at once instead of after 10 s.
        return (f"{path}?timeout_s=0" if path.endswith("/wait") else path), None
    if route.startswith("/v1/comparisons"):
        # The finished job rerun under a calculator version of the cell's own.
        with transaction(lab.engine) as session:
            register(session, name=f"swap-{n}", version="1", backend="emt", elements=["Cu"])
        body = {"job_ids": [job], "calculator": f"swap-{n}@1"}
        if method == "POST":
            return route, body
        created = lab.http.post("/v1/comparisons", json=body, headers=lab.headers["admin"])
        assert created.status_code == 201, created.text
        return f"/v1/comparisons/{created.json()['id']}", None
    assert "{" not in route, f"no request prepared for {method} {route}"
    return route, None


def row_counts(engine: Engine) -> dict[str, int]:
    with engine.connect() as connection:
        return {
            table: connection.execute(text(f'SELECT count(*) FROM "{table}"')).scalar_one()
            for table in inspect(engine).get_table_names()
        }


@pytest.mark.parametrize("actor", ACTORS)
@pytest.mark.parametrize(("method", "route"), list(MATRIX), ids=" ".join)
def test_access_matrix(lab: Lab, method: str, route: str, actor: str) -> None:
    status, _, code = MATRIX[(method, route)][ACTORS.index(actor)].partition(" ")
    path, body = prepare(lab, method, route)
    before = row_counts(lab.engine)

    response = lab.http.request(method, path, json=body, headers=lab.headers[actor])

    assert response.status_code == int(status), response.text
    if status == "401":
        code = UNIDENTIFIED[actor]
    if code:
        refusal = response.json()
        assert refusal["code"] == code
        assert refusal["detail"]  # says what was wrong, not just a code
        assert row_counts(lab.engine) == before, "a refused request wrote something"


def test_matrix_has_a_row_for_every_route(lab: Lab) -> None:
    """A new route without a row here fails; so does a route hidden from the document."""
    methods = {"get", "put", "post", "delete", "patch", "head", "options", "trace"}
    document = lab.http.app.openapi()  # type: ignore[attr-defined]
    documented = {
        (method.upper(), path)
        for path, operations in document["paths"].items()
        for method in operations
        if method in methods
    }
    served = {
        (method, route.path)
        for router in (public_router, jobs_router, admin_router, batches_router, comparisons_router)
        for route in router.routes
        if isinstance(route, APIRoute)
        for method in route.methods
    }
    assert documented == set(MATRIX)
    assert served == documented
    assert all(len(cells) == len(ACTORS) for cells in MATRIX.values())


def test_members_cancel_their_own_jobs_and_admins_any(lab: Lab) -> None:
    """The cancel cells above, followed to the job's state."""
    mine = lab.submit("owner")
    refused = lab.http.post(f"/v1/jobs/{mine}/cancel", headers=lab.headers["other member"])
    assert refused.status_code == 403
    assert "only its owner or an admin can cancel it" in refused.json()["detail"]
    state = lab.http.get(f"/v1/jobs/{mine}", headers=lab.headers["owner"]).json()["state"]
    assert state == "queued"
    by_admin = lab.http.post(f"/v1/jobs/{mine}/cancel", headers=lab.headers["admin"])
    assert by_admin.json()["state"] == "cancelled"


@pytest.mark.parametrize(
    "authorization",
    ["Basic YWRhOnNlY3JldA==", "Bearer", "Bearer ", "Token atq_x", "atq_x", ""],
)
def test_malformed_authorization_headers_are_401(lab: Lab, authorization: str) -> None:
    response = lab.http.get("/v1/me", headers={"Authorization": authorization})
    assert response.status_code == 401
    assert response.json()["code"] in {"missing_token", "invalid_token"}


# -- tokens: stored hashed, shown once, revoked at once ------------------------------------
def database_text(engine: Engine) -> str:
    """Every column of every row of every table, read as text."""
    parts = []
    with engine.connect() as connection:
        for table in inspect(engine).get_table_names():
            for row in connection.execute(text(f'SELECT * FROM "{table}"')):
                parts.extend(str(value) for value in row)
    return "\n".join(parts)


def database_files(settings: Settings) -> bytes:
    """The SQLite file and its write-ahead log, byte for byte (recent writes live in the
    log until a checkpoint)."""
    base = settings.data_dir / "atomq.db"
    files = [base, Path(f"{base}-wal"), Path(f"{base}-shm")]
    return b"".join(path.read_bytes() for path in files if path.exists())


def test_tokens_are_stored_hashed_and_never_in_plaintext(lab: Lab) -> None:
    created = lab.http.post("/v1/users", json={"name": "hash-check"}, headers=lab.headers["admin"])
    assert created.status_code == 201
    issued = lab.http.post("/v1/users/hash-check/tokens", json={}, headers=lab.headers["admin"])
    assert issued.status_code == 201
    secrets_issued = [
        created.json()["token"],
        issued.json()["token"],
        lab.app.token,  # issued outside the API, by `atomq users add`
        lab.headers["owner"]["Authorization"].removeprefix("Bearer "),
    ]

    stored = database_text(lab.engine)
    raw = database_files(lab.app.settings)

    # The scans see the data: the user's name and each token's sha256 are there.
    assert "hash-check" in stored and b"hash-check" in raw
    for secret in secrets_issued:
        assert hash_token(secret) in stored
        assert secret not in stored
        assert secret.encode() not in raw


def test_a_token_is_shown_once_and_never_listed(lab: Lab) -> None:
    issued = lab.http.post("/v1/users/owner-member/tokens", json={}, headers=lab.headers["admin"])
    secret = issued.json()["token"]
    assert secret.startswith("atq_")

    listed = lab.http.get("/v1/users/owner-member/tokens", headers=lab.headers["admin"])

    assert listed.status_code == 200
    assert issued.json()["id"] in [t["id"] for t in listed.json()]
    assert all("token" not in record for record in listed.json())
    assert secret not in listed.text
    assert hash_token(secret) not in listed.text  # nor its hash: that is the stored secret
    me = lab.http.get("/v1/me", headers=bearer(secret))
    assert me.status_code == 200 and secret not in me.text


def test_a_revoked_token_stops_working_at_once(lab: Lab) -> None:
    issued = lab.http.post("/v1/users/other-member/tokens", json={}, headers=lab.headers["admin"])
    token, token_id = issued.json()["token"], issued.json()["id"]
    assert lab.http.get("/v1/me", headers=bearer(token)).status_code == 200

    revoked = lab.http.post(f"/v1/tokens/{token_id}/revoke", headers=lab.headers["admin"])
    assert revoked.json()["revoked"] is True

    refused = lab.http.get("/v1/me", headers=bearer(token))
    assert refused.status_code == 401
    assert refused.json()["code"] == "revoked_token"
    # The member's other token is unaffected.
    assert lab.http.get("/v1/me", headers=lab.headers["other member"]).status_code == 200


def test_an_expired_token_is_refused_and_says_so(lab: Lab) -> None:
    response = lab.http.get("/v1/me", headers=lab.headers["expired token"])
    assert response.status_code == 401
    assert "expired" in response.json()["detail"]


# -- calculator backends: only installed entry points -------------------------------------
CANARY = "atomq_test_canary_backend"


@pytest.mark.parametrize(
    "backend",
    [
        "no-such-backend",
        "EMT",  # entry point names are exact
        "emt ",
        "os:system",
        "subprocess",
        "atomq_service.users:hash_token",
        f"{CANARY}:make",
        "../../emt",
    ],
)
def test_a_backend_that_is_not_installed_is_refused_and_nothing_is_imported(
    lab: Lab, backend: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A module that would betray an import by existing in sys.modules afterwards.
    (tmp_path / f"{CANARY}.py").write_text("def make():\n    raise SystemExit('imported')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    before = row_counts(lab.engine)

    response = lab.http.post(
        "/v1/calculators",
        json={"name": "smuggled", "version": "1", "backend": backend, "elements": ["Cu"]},
        headers=lab.headers["admin"],
    )

    assert response.status_code == 422, response.text
    refusal = response.json()
    assert refusal["code"] == "unknown_backend"
    assert f"no backend {backend!r} is installed" in refusal["detail"]
    assert "installed: " in refusal["detail"] and "emt" in refusal["detail"]
    assert CANARY not in sys.modules
    assert row_counts(lab.engine) == before
    with Session(lab.engine) as session:
        assert session.exec(select(Calculator).where(Calculator.name == "smuggled")).first() is None


# -- artifacts: addressed by integer id only ----------------------------------------------
def test_an_artifact_downloads_by_id_as_recorded(lab: Lab) -> None:
    """The positive control for the refusals below: the id gives the recorded file."""
    listed = lab.http.get(f"/v1/jobs/{lab.finished_job}/artifacts", headers=lab.headers["owner"])
    record = next(a for a in listed.json() if a["id"] == lab.artifact)

    response = lab.http.get(f"/v1/artifacts/{lab.artifact}", headers=lab.headers["other member"])

    assert response.status_code == 200
    assert hashlib.sha256(response.content).hexdigest() == record["sha256"]
    # ASE itself reads the trajectory back: Cu2 in every frame, and the last frame is the
    # final structure of the job's result (extxyz keeps 8 decimals).
    frames = ase.io.read(io.StringIO(response.text), index=":", format="extxyz")
    assert {atoms.get_chemical_formula() for atoms in frames} == {"Cu2"}
    result = lab.http.get(f"/v1/jobs/{lab.finished_job}/result", headers=lab.headers["owner"])
    final = np.array(result.json()["structure"]["positions"])
    np.testing.assert_allclose(frames[-1].positions, final, rtol=0, atol=1e-8)


@pytest.mark.parametrize(
    "path",
    [
        "/v1/artifacts/..%2F..%2Fetc%2Fpasswd",
        "/v1/artifacts/1%2F..%2F..%2Fatomq.db",
        "/v1/artifacts/%2E%2E%2F%2E%2E%2Fatomq.db",
        "/v1/artifacts/..%252F..%252Fatomq.db",  # encoded twice
        "/v1/artifacts/1%00.db",
        "/v1/artifacts/atomq.db",
        "/v1/artifacts/1.5",
        "/v1/artifacts/0x1",
        "/v1/artifacts/-1",
        "/v1/artifacts/99999",
    ],
)
def test_crafted_artifact_paths_give_no_file(lab: Lab, path: str) -> None:
    response = lab.http.get(path, headers=lab.headers["admin"])

    assert response.status_code in (404, 422), response.text
    assert response.headers["content-type"] == "application/json"
    assert b"SQLite format 3" not in response.content
    assert b"root:" not in response.content
    assert b"Properties=" not in response.content  # nor some trajectory instead


def test_a_recorded_path_outside_the_store_is_not_served(lab: Lab) -> None:
    """Paths come from the database; even a bad row there must not reach outside the
    artifact store."""
    with transaction(lab.engine) as session:
        row = Artifact(
            job_id=lab.finished_job,
            attempt=1,
            name="escape",
            media_type="application/octet-stream",
            path="../atomq.db",
            size=0,
            sha256="0" * 64,
        )
        session.add(row)
        session.flush()
        artifact_id = row.id

    response = lab.http.get(f"/v1/artifacts/{artifact_id}", headers=lab.headers["admin"])

    assert response.status_code == 410
    assert response.json()["code"] == "artifact_missing"
    assert b"SQLite format 3" not in response.content
