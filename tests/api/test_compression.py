"""Large payloads travel gzip-compressed both ways, under the same size limits."""

from __future__ import annotations

import gzip
import json
from collections.abc import Iterator

import httpx
import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT

from atomq import Client, SinglePoint, Structure
from atomq.client import GZIP_REQUEST_BYTES, json_body
from atomq_service.app import GZIP_MINIMUM_BYTES
from atomq_workers.execute import run_job
from tests.api.bodies import SINGLE_POINT
from tests.conftest import App


@pytest.fixture
def client(app: App) -> Iterator[Client]:
    transport: httpx.BaseTransport = app.http._transport
    with Client(url="http://testserver", token=app.token, transport=transport) as connected:
        yield connected


def test_a_large_structure_goes_compressed_and_comes_back_exact(app: App, client: Client) -> None:
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((11, 11, 11))  # 5324 atoms
    atoms.rattle(0.02, seed=1)
    body = json_body(Structure.from_atoms(atoms).model_dump_json())
    assert len(Structure.from_atoms(atoms).model_dump_json()) > GZIP_REQUEST_BYTES
    assert body["headers"]["Content-Encoding"] == "gzip"

    job = client.submit(atoms, SinglePoint(), calculator="emt", reuse=False)
    assert run_job(app.engine, job.id, app.settings).state == "succeeded"
    fetched = job.atoms()
    np.testing.assert_array_equal(fetched.positions, atoms.positions)
    # Reference: ASE's EMT on the same cell, in this process.
    atoms.calc = EMT()
    np.testing.assert_array_equal(fetched.get_forces(), atoms.get_forces())

    raw = app.http.get(
        f"/v1/jobs/{job.id}/result", headers={**app.headers, "Accept-Encoding": "gzip"}
    )
    assert raw.headers["content-encoding"] == "gzip"
    assert int(raw.headers["content-length"]) < GZIP_MINIMUM_BYTES * 8  # compressed on the wire
    plain = app.http.get(
        f"/v1/jobs/{job.id}/result", headers={**app.headers, "Accept-Encoding": "identity"}
    )
    assert "content-encoding" not in plain.headers and plain.json() == raw.json()


def post_raw(app: App, content: bytes, encoding: str) -> httpx.Response:
    return app.http.post(
        "/v1/jobs",
        content=content,
        headers={**app.headers, "Content-Type": "application/json", "Content-Encoding": encoding},
    )


def test_a_small_body_that_inflates_past_the_limit_is_refused(app: App) -> None:
    limit = app.settings.max_body_bytes
    padded = json.dumps({**SINGLE_POINT, "tags": [" " * (limit + 10)]}).encode()
    bomb = gzip.compress(padded, compresslevel=9)
    assert len(bomb) < limit / 100  # what arrives is small
    before = app.counts()
    refused = post_raw(app, bomb, "gzip")
    assert refused.status_code == 413 and refused.json()["code"] == "body_too_large"
    assert app.counts() == before


@pytest.mark.parametrize(
    ("content", "encoding", "status", "code"),
    [
        (b"not gzip at all", "gzip", 400, "bad_gzip"),
        (gzip.compress(json.dumps(SINGLE_POINT).encode())[:-12], "gzip", 400, "bad_gzip"),
        (json.dumps(SINGLE_POINT).encode(), "br", 415, "unsupported_encoding"),
    ],
    ids=["not gzip", "cut short", "unknown encoding"],
)
def test_bad_encodings_are_refused_and_nothing_is_written(
    app: App, content: bytes, encoding: str, status: int, code: str
) -> None:
    before = app.counts()
    refused = post_raw(app, content, encoding)
    assert refused.status_code == status and refused.json()["code"] == code
    assert app.counts() == before


def test_a_plain_gzip_body_is_accepted(app: App) -> None:
    created = post_raw(app, gzip.compress(json.dumps(SINGLE_POINT).encode()), "gzip")
    assert created.status_code == 201, created.text
