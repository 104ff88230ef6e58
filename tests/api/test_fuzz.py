"""Property-based fuzzing of the HTTP API, and hostile structures through POST /v1/jobs.

1. Schemathesis generates requests for every operation of the service's own OpenAPI
   document, valid ones and invalid ones, and sends them to the app in-process. Each
   response must not be a 5xx and must conform to the document: a documented status
   code, content type, headers and body schema.
2. Hypothesis builds structures with hostile values (NaN, infinities, 1e308, giant
   integers, wrong shapes, mismatched lengths, text in number fields). Each must be
   refused with a 4xx whose {"detail", "code"} body names the problem, writing nothing.

What the fuzzer found when it was first written is reproduced at the end of this file, one
test per bug (each fixed since), with the exact request.
"""

from __future__ import annotations

import json
import math
import uuid
from collections import Counter
from collections.abc import Iterator
from contextlib import suppress
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
import schemathesis
from fastapi import FastAPI
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.errors import FailureGroup
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)
from sqlalchemy import update

from atomq_service.app import create_app
from atomq_service.db import transaction
from atomq_service.models import ApiToken
from atomq_service.settings import Settings
from atomq_service.users import add_user, hash_token
from atomq_workers.execute import run_job
from tests.api.bodies import CU_DIMER, SHORT_MD, SINGLE_POINT
from tests.conftest import POSTGRES_ADMIN_URL, App, port_open, unavailable

INT64_MAX = 2**63 - 1  # SQLite's INTEGER and PostgreSQL's BIGINT hold no more


# == 1. the API against its own OpenAPI document ===========================================
RESPONSE_CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
]
# The server-sent events and wait routes are not fuzzed: for a job that has not ended
# (the fuzzer creates queued jobs, and no worker runs here) they hold the request open
# (up to a read timeout, or the 60 s the wait allows), so each case would wait it out.
# Their 401/404 answers are covered in test_access.py, the wait's parameters in
# test_wait.py.
NOT_FUZZED = {
    ("GET", "/v1/jobs/{job_id}/events"),
    ("GET", "/v1/jobs/{job_id}/wait"),
    ("GET", "/v1/batches/{batch_id}/wait"),
}


@dataclass
class Pass:
    """One fuzzing pass: generated examples per operation, valid and invalid."""

    role: str
    positive: int
    negative: int


PASSES = [Pass("admin", positive=50, negative=25), Pass("member", positive=8, negative=4)]


@dataclass
class Tally:
    cases: int = 0
    statuses: Counter[tuple[str, int]] = field(default_factory=Counter)
    failures: dict[str, str] = field(default_factory=dict)  # first report per kind


def fuzzing_app(data_dir: Path) -> tuple[FastAPI, Settings]:
    # The rate limit is off: one token sends thousands of requests a minute here.
    # test_limits.py tests the limit itself.
    settings = Settings(
        data_dir=data_dir,
        broker_url="memory://",
        reconcile_interval_s=0,
        requests_per_minute=0,
    )
    return create_app(settings), settings


def with_installed_backend(case: Any) -> Any:
    """A registration the service can accept, so that 201 answers are checked too."""
    if isinstance(case.body, dict):
        case.body["backend"] = "emt"
        case.body["elements"] = ["Cu"]
    return case


@pytest.mark.parametrize("fuzz_pass", PASSES, ids=lambda p: p.role)
def test_fuzz_the_api_from_its_openapi_document(tmp_path: Path, fuzz_pass: Pass) -> None:
    app, app_settings = fuzzing_app(tmp_path / "data")
    # Loading the document through the ASGI app also runs the app's startup (the schema,
    # the default calculators); the seeded records below give the fuzzer real ids to hit.
    schema = schemathesis.openapi.from_asgi("/openapi.json", app)
    engine = app.state.engine
    tokens = {"admin": add_user(engine, "fuzz-admin", "admin")}
    tokens["member"] = add_user(engine, "fuzz-member")
    token = tokens[fuzz_pass.role]
    auth = {"Authorization": f"Bearer {token}"}
    seeded = TestClient(app).post("/v1/jobs", json=SHORT_MD, headers=auth)
    assert run_job(engine, seeded.json()["id"], app_settings).state == "succeeded"

    tally = Tally()

    def run_case(case: Any, label: str) -> None:
        tally.cases += 1
        try:
            response = case.call(headers=auth)
        except Exception as error:  # the app raised: a 5xx
            tally.statuses[(label, 500)] += 1
            tally.failures.setdefault(
                f"{label}: {type(error).__name__}",
                f"{error}\n{case.as_curl_command(headers=auth)}",
            )
            return
        finally:
            # The fuzzer may revoke any token id, its own included; keep its own alive so
            # the rest of the pass still reaches the routes behind authentication.
            if label == "POST /v1/tokens/{token_id}/revoke":
                with transaction(engine) as session:
                    session.execute(
                        update(ApiToken)
                        .where(ApiToken.token_sha256 == hash_token(token))  # type: ignore[arg-type]
                        .values(revoked=False)
                    )
        tally.statuses[(label, response.status_code)] += 1
        try:
            case.validate_response(response, checks=RESPONSE_CHECKS, headers=auth)
        except FailureGroup as failure:
            tally.failures.setdefault(f"{label}: {response.status_code}", str(failure))

    fuzz = settings(
        deadline=None,
        derandomize=True,  # the same cases on every run and in CI
        database=None,
        suppress_health_check=list(HealthCheck),
    )
    for result in schema.get_all_operations():
        operation = result.ok()
        label = f"{operation.method.upper()} {operation.path}"
        if (operation.method.upper(), operation.path) in NOT_FUZZED:
            continue
        strategies = [
            (operation.as_strategy(GenerationMode.POSITIVE), fuzz_pass.positive),
            (operation.as_strategy(GenerationMode.NEGATIVE), fuzz_pass.negative),
        ]
        if label == "POST /v1/jobs":  # a valid body, with generated Idempotency-Keys
            strategies.append((operation.as_strategy(body=SINGLE_POINT), fuzz_pass.positive))
        if label == "POST /v1/calculators":
            strategies.append(
                (operation.as_strategy().map(with_installed_backend), fuzz_pass.positive)
            )
        for strategy, examples in strategies:

            @settings(fuzz, max_examples=examples)
            @given(case=strategy)
            def generated(case: Any) -> None:
                run_case(case, label)  # noqa: B023  (called at once, inside this loop turn)

            # Unsatisfiable: nothing to make invalid (an operation without parameters).
            with suppress(Unsatisfiable):
                generated()

    print(f"\n{fuzz_pass.role}: {tally.cases} cases")
    for (label, status), count in sorted(tally.statuses.items()):
        print(f"  {label} -> {status}: {count}")
    assert not tally.failures, "\n\n".join(f"{k}\n{v}" for k, v in tally.failures.items())
    if fuzz_pass.role == "admin":
        assert tally.cases >= 1000
    # The fuzzer reached past authentication and validation, not only refusals.
    reached = {label for (label, status) in tally.statuses if 200 <= status < 300}
    assert {"POST /v1/jobs", "GET /v1/jobs/{job_id}/result"} <= reached


# == 2. hostile structures through POST /v1/jobs ===========================================
@dataclass(frozen=True)
class Hostile:
    """A structure that must be refused, and words of which the refusal names one."""

    structure: Any
    names: tuple[str, ...]


def with_(**fields: Any) -> dict[str, Any]:
    return {**CU_DIMER, **fields}


def post_job(client: TestClient, headers: dict[str, str], structure: Any) -> httpx.Response:
    # Raw text, so NaN and Infinity can be sent: JSON proper has no spelling for them.
    body = json.dumps({**SINGLE_POINT, "structure": structure}, allow_nan=True)
    return client.post(
        "/v1/jobs", content=body, headers={**headers, "Content-Type": "application/json"}
    )


def assert_refused_by_name(app: App, hostile: Hostile) -> None:
    before = app.counts()
    response = post_job(app.http, app.headers, hostile.structure)
    assert 400 <= response.status_code < 500, response.text
    refusal = response.json()
    assert set(refusal) == {"detail", "code"}
    assert refusal["code"] and isinstance(refusal["code"], str)
    detail = refusal["detail"].lower()
    assert any(name.lower() in detail for name in hostile.names), refusal["detail"]
    assert app.counts() == before


# The cases the brief names, each stated once; Hypothesis explores around them below.
HOSTILE = {
    "NaN position": Hostile(with_(positions=[[0, 0, 0], [math.nan, 0, 0]]), ("position",)),
    "inf position": Hostile(with_(positions=[[0, 0, 0], [math.inf, 0, 0]]), ("position",)),
    "-inf position": Hostile(with_(positions=[[0, 0, -math.inf], [2.5, 0, 0]]), ("position",)),
    "1e308 position": Hostile(with_(positions=[[0, 0, 0], [1e308, 0, 0]]), ("position",)),
    "-1e308 position": Hostile(with_(positions=[[0, -1e308, 0], [2.5, 0, 0]]), ("position",)),
    "giant integer position": Hostile(
        with_(positions=[[10**400, 0, 0], [2.5, 0, 0]]), ("position",)
    ),
    "NaN cell": Hostile(with_(cell=[[math.nan, 0, 0], [0, 9, 0], [0, 0, 9]]), ("cell",)),
    "huge cell": Hostile(
        with_(cell=[[1e308, 0, 0], [0, 1e308, 0], [0, 0, 1e308]], pbc=[True] * 3), ("cell",)
    ),
    "-1e308 cell": Hostile(with_(cell=[[9, 0, 0], [0, 9, 0], [0, 0, -1e308]]), ("cell",)),
    "empty arrays": Hostile({"numbers": [], "positions": []}, ("no atoms",)),
    "positions with 2 components": Hostile(with_(positions=[[0, 0], [2.5, 0]]), ("positions",)),
    "positions with 4 components": Hostile(
        with_(positions=[[0, 0, 0, 0], [2.5, 0, 0, 0]]), ("positions",)
    ),
    "cell with 2 rows": Hostile(with_(cell=[[9, 0, 0], [0, 9, 0]]), ("cell",)),
    "pbc with 2 entries": Hostile(with_(pbc=[True, True]), ("pbc",)),
    "more positions than numbers": Hostile(
        with_(positions=[[0, 0, 0], [2.5, 0, 0], [5, 0, 0]]), ("positions",)
    ),
    "fewer charges than atoms": Hostile(with_(initial_charges=[0.0]), ("initial_charges",)),
    "atomic number 0": Hostile(with_(numbers=[0, 29]), ("atomic number",)),
    "atomic number 119": Hostile(with_(numbers=[29, 119]), ("atomic number",)),
    "giant atomic number": Hostile(with_(numbers=[29, 10**400]), ("numbers",)),
    "negative atomic number": Hostile(with_(numbers=[-29, 29]), ("atomic number",)),
    "constraint on a giant index": Hostile(
        with_(constraints=[{"type": "FixAtoms", "indices": [10**30]}]), ("fixatoms",)
    ),
    "text for a coordinate": Hostile(
        with_(positions=[["zero", 0, 0], [2.5, 0, 0]]), ("positions",)
    ),
    "text for an atomic number": Hostile(with_(numbers=["copper", 29]), ("numbers",)),
    "text for a momentum": Hostile(with_(momenta=[[0, 0, "fast"], [0, 0, 0]]), ("momenta",)),
    "structure is text": Hostile("Cu2 at the origin", ("structure",)),
    "positions is a number": Hostile(with_(positions=2.5), ("positions",)),
}


@pytest.mark.parametrize("hostile", HOSTILE.values(), ids=HOSTILE.keys())
def test_a_hostile_structure_is_refused_by_name(app: App, hostile: Hostile) -> None:
    assert_refused_by_name(app, hostile)


def is_not_a_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return True
    return False


NON_FINITE = st.sampled_from([math.nan, math.inf, -math.inf])
BEYOND_A_MICROMETRE = st.floats(min_value=1e4, exclude_min=True, allow_infinity=False)
GIANT_INTEGERS = st.integers(min_value=10**309, max_value=10**400)  # beyond any float64
TEXT = st.text(max_size=12).filter(is_not_a_number)


def signed(strategy: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    return st.tuples(strategy, st.sampled_from([1, -1])).map(lambda pair: pair[0] * pair[1])


# A length (position or cell component) must be finite and at most 1e4 Angstrom.
HOSTILE_LENGTH = st.one_of(
    NON_FINITE, signed(BEYOND_A_MICROMETRE), signed(st.integers(10**5, 10**400)), TEXT
)
# Other per-atom numbers must at least be finite numbers.
HOSTILE_NUMBER = st.one_of(NON_FINITE, signed(GIANT_INTEGERS), TEXT)
HOSTILE_ATOMIC_NUMBER = st.one_of(
    st.integers(max_value=0),
    st.integers(min_value=119),
    NON_FINITE,
    st.floats(1.01, 118.99).filter(lambda x: not x.is_integer()),
    TEXT,
)
WRONG_LENGTH = st.sampled_from([0, 1, 2, 4, 5])


@st.composite
def hostile_structures(draw: st.DrawFn) -> Hostile:
    """A valid Cu structure with one hostile change."""
    natoms = draw(st.integers(1, 4))
    structure: dict[str, Any] = {
        "numbers": [29] * natoms,
        "positions": [[2.5 * i, 0.0, 0.0] for i in range(natoms)],
        "cell": [[20.0, 0.0, 0.0], [0.0, 20.0, 0.0], [0.0, 0.0, 20.0]],
        "pbc": draw(st.lists(st.booleans(), min_size=3, max_size=3)),
    }
    atom, axis = draw(st.integers(0, natoms - 1)), draw(st.integers(0, 2))
    change = draw(
        st.sampled_from(
            [
                "position value",
                "cell value",
                "per-atom value",
                "atomic number",
                "position shape",
                "cell shape",
                "pbc shape",
                "pbc value",
                "length mismatch",
                "no atoms",
                "constraint index",
            ]
        )
    )
    names: tuple[str, ...]
    if change == "position value":
        structure["positions"][atom][axis] = draw(HOSTILE_LENGTH)
        names = ("position",)
    elif change == "cell value":
        structure["cell"][draw(st.integers(0, 2))][axis] = draw(HOSTILE_LENGTH)
        names = ("cell",)
    elif change == "per-atom value":
        which = draw(st.sampled_from(["momenta", "initial_charges", "initial_magmoms"]))
        if which == "momenta":
            structure["momenta"] = [[0.0, 0.0, 0.0] for _ in range(natoms)]
            structure["momenta"][atom][axis] = draw(HOSTILE_NUMBER)
        else:
            structure[which] = [0.0] * natoms
            structure[which][atom] = draw(HOSTILE_NUMBER)
        names = (which,)
    elif change == "atomic number":
        structure["numbers"][atom] = draw(HOSTILE_ATOMIC_NUMBER)
        names = ("atomic number", "numbers")
    elif change == "position shape":
        structure["positions"][atom] = [0.0] * draw(WRONG_LENGTH)
        names = ("positions",)
    elif change == "cell shape":
        if draw(st.booleans()):
            structure["cell"] = [[20.0, 0.0, 0.0]] * draw(WRONG_LENGTH)
        else:
            structure["cell"][axis] = [20.0] * draw(WRONG_LENGTH)
        names = ("cell",)
    elif change == "pbc shape":
        structure["pbc"] = [True] * draw(WRONG_LENGTH)
        names = ("pbc",)
    elif change == "pbc value":
        structure["pbc"][axis] = draw(
            st.one_of(st.integers(min_value=2), st.integers(max_value=-1), NON_FINITE)
        )
        names = ("pbc",)
    elif change == "length mismatch":
        which = draw(st.sampled_from(["positions", "initial_charges", "tags"]))
        count = draw(st.integers(0, 6).filter(lambda n: n != natoms))
        if which == "positions":
            structure["positions"] = [[2.5 * i, 0.0, 0.0] for i in range(count)]
        else:
            structure[which] = [0] * count
        names = (which,) if count else (which, "no atoms")
    elif change == "no atoms":
        structure.update(numbers=[], positions=[])
        names = ("no atoms",)
    else:
        bad = draw(st.one_of(st.integers(min_value=natoms), st.integers(max_value=-1)))
        structure["constraints"] = [{"type": "FixAtoms", "indices": [bad]}]
        names = ("fixatoms",)
    return Hostile(structure, names)


@settings(
    max_examples=200,
    deadline=None,
    derandomize=True,
    database=None,
    # One app serves every example: each compares the row counts before and after itself.
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(hostile=hostile_structures())
@example(hostile=HOSTILE["NaN position"])
def test_hostile_structures_are_refused_by_name_and_write_nothing(
    app: App, hostile: Hostile
) -> None:
    assert_refused_by_name(app, hostile)


# == 3. product bugs found here, each with its exact request ===============================
@pytest.fixture
def lenient(app: App) -> TestClient:
    """The same app (already started), answering a crash with the 500 a real server sends
    instead of raising it into the test."""
    return TestClient(app.http.app, raise_server_exceptions=False)


BEYOND_64_BITS = str(INT64_MAX + 1)


@pytest.mark.parametrize(
    ("method", "path", "body"),
    [
        ("GET", f"/v1/jobs/{BEYOND_64_BITS}", None),
        ("GET", f"/v1/jobs/-{INT64_MAX + 2}", None),
        ("POST", f"/v1/jobs/{BEYOND_64_BITS}/cancel", None),
        ("GET", f"/v1/jobs/{BEYOND_64_BITS}/result", None),
        ("GET", f"/v1/artifacts/{BEYOND_64_BITS}", None),
        ("POST", f"/v1/tokens/{BEYOND_64_BITS}/revoke", None),
        ("GET", f"/v1/jobs?offset={BEYOND_64_BITS}", None),
        (
            "POST",
            "/v1/jobs",
            {
                "task": {"kind": "neb", "initial": {"job": INT64_MAX + 1}, "final": {"job": 1}},
                "calculator": "emt",
            },
        ),
    ],
)
def test_an_integer_beyond_64_bits_is_refused_not_a_crash(
    app: App, lenient: TestClient, method: str, path: str, body: dict[str, Any] | None
) -> None:
    response = lenient.request(method, path, json=body, headers=app.headers)
    assert response.status_code in (404, 422), response.text
    assert set(response.json()) == {"detail", "code"}


@pytest.mark.parametrize(
    ("method", "path", "content"),
    [
        ("POST", "/v1/jobs", b"\xff"),
        ("POST", "/v1/users", b'{"name": "\xff"}'),
        ("POST", "/v1/jobs", b"[" * 100_000 + b"]" * 100_000),
        ("GET", "/v1/no-such-route", None),
        ("DELETE", "/v1/jobs", None),
    ],
)
def test_every_refusal_carries_a_code(
    app: App, lenient: TestClient, method: str, path: str, content: bytes | None
) -> None:
    headers = {**app.headers, "Content-Type": "application/json"}
    response = lenient.request(method, path, content=content, headers=headers)
    assert 400 <= response.status_code < 500
    refusal = response.json()
    assert set(refusal) == {"detail", "code"}, refusal
    if method == "POST":
        assert response.status_code == 400  # the documented status for a body not JSON


def test_an_artifact_is_served_with_a_documented_media_type(app: App) -> None:
    job_id = app.http.post("/v1/jobs", json=SHORT_MD, headers=app.headers).json()["id"]
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    artifact = app.http.get(f"/v1/jobs/{job_id}/artifacts", headers=app.headers).json()[0]
    document = app.http.app.openapi()  # type: ignore[attr-defined]
    operation = document["paths"]["/v1/artifacts/{artifact_id}"]["get"]

    response = app.http.get(f"/v1/artifacts/{artifact['id']}", headers=app.headers)

    assert response.status_code == 200
    media_type = response.headers["content-type"].split(";")[0]
    assert media_type in operation["responses"]["200"]["content"], media_type


@pytest.mark.parametrize("tag", [INT64_MAX + 1, 2**70, -(2**63) - 1])
def test_a_giant_tag_is_refused_by_name(app: App, lenient: TestClient, tag: int) -> None:
    response = post_job(lenient, app.headers, with_(tags=[tag, 1]))
    assert response.status_code == 422, response.text
    assert "tags" in response.json()["detail"]


@pytest.mark.parametrize("value", [math.nan, math.inf, [1.0, -math.inf]])
def test_non_finite_info_is_refused_by_name(app: App, lenient: TestClient, value: Any) -> None:
    before = app.counts()
    response = post_job(lenient, app.headers, with_(info={"strain": value}))
    assert response.status_code == 422, response.text
    assert "info" in response.json()["detail"]
    assert app.counts() == before


@pytest.mark.parametrize(
    "structure",
    [
        with_(positions=[[0, 0, 0], ["2.5", "0", "0"]]),
        with_(positions=[[0, 0, 0], [2.5, True, 0]]),
        with_(numbers=["29", 29]),
        with_(cell=[["9", 0, 0], [0, 9, 0], [0, 0, 9]]),
    ],
    ids=["text coordinates", "boolean coordinate", "text atomic number", "text cell"],
)
def test_text_and_booleans_in_number_fields_are_refused(app: App, structure: Any) -> None:
    response = post_job(app.http, app.headers, structure)
    assert response.status_code == 422, response.text


@pytest.mark.parametrize(
    "structure",
    [
        with_(momenta=[[1e308, 0, 0], [0, 0, 0]]),
        with_(initial_charges=[-1e308, 0]),
        with_(initial_magmoms=[1e308, 0]),
    ],
    ids=["momenta", "initial_charges", "initial_magmoms"],
)
def test_per_atom_values_out_of_range_are_refused(app: App, structure: Any) -> None:
    response = post_job(app.http, app.headers, structure)
    assert response.status_code == 422, response.text


@pytest.fixture(scope="module")
def postgres_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[App]:
    """The app over a PostgreSQL database of its own, as in a lab deployment."""
    if not port_open("127.0.0.1", 5432):
        unavailable("no PostgreSQL on 127.0.0.1:5432")
    import psycopg

    admin = POSTGRES_ADMIN_URL.replace("postgresql+psycopg://", "postgresql://")
    name = f"atomq_test_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(f'CREATE DATABASE "{name}"')
    settings = Settings(
        data_dir=tmp_path_factory.mktemp("postgres"),
        database_url=f"{POSTGRES_ADMIN_URL.rsplit('/', 1)[0]}/{name}",
        broker_url="memory://",
        reconcile_interval_s=0,
    )
    try:
        with TestClient(create_app(settings), raise_server_exceptions=False) as client:
            yield App(client, settings)
    finally:
        with psycopg.connect(admin, autocommit=True) as connection:
            connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.mark.postgres
@pytest.mark.parametrize(
    ("method", "path", "body"),
    [
        ("GET", f"/v1/jobs/{2**31}", None),
        ("POST", "/v1/jobs", {**SINGLE_POINT, "tags": ["anneal\x00ed"]}),
        ("GET", "/v1/jobs?tag=anneal%00ed", None),
        (
            "POST",
            "/v1/calculators",
            {
                "name": "emt-nul",
                "version": "1",
                "backend": "emt",
                "elements": ["Cu"],
                "notes": "\x00",
            },
        ),
    ],
)
def test_postgres_refuses_out_of_range_ids_and_nul_characters_by_name(
    postgres_app: App, method: str, path: str, body: dict[str, Any] | None
) -> None:
    response = postgres_app.http.request(method, path, json=body, headers=postgres_app.headers)
    assert response.status_code in (404, 422), response.text
    assert set(response.json()) == {"detail", "code"}
