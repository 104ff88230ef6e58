"""Registering calculator versions with a weights file: the service records the file's
sha256 and size, and refuses what it cannot vouch for, writing nothing."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import App

WEIGHTS = b"made-up fitted weights of the Brackenfield group's Cu-Ni-Al model\n" * 100


def record(**fields: Any) -> dict[str, Any]:
    return {"name": "emt-fit", "version": "1", "backend": "emt", "elements": ["Cu"], **fields}


@pytest.fixture
def weights(tmp_path: Path) -> Path:
    path = tmp_path / "shared-weights" / "fit.bin"
    path.parent.mkdir()
    path.write_bytes(WEIGHTS)
    return path


def test_weights_file_is_recorded_by_sha256_and_size(app: App, weights: Path) -> None:
    # Reference: hashlib over the bytes written above.
    sha256 = hashlib.sha256(WEIGHTS).hexdigest()
    created = app.http.post(
        "/v1/calculators",
        json=record(weights_path=str(weights), weights_sha256=sha256),
        headers=app.headers,
    )
    assert created.status_code == 201, created.text
    body = created.json()
    assert (body["weights_sha256"], body["weights_size"]) == (sha256, len(WEIGHTS))
    assert body["weights_path"] == str(weights)
    shown = app.http.get("/v1/calculators/emt-fit/1", headers=app.headers).json()
    assert shown["weights_sha256"] == sha256 and shown["jobs_run"] == 0
    assert shown["workers"] == []  # no worker runs in this in-process app


@pytest.mark.parametrize(
    ("fields", "code", "says"),
    [
        ({"weights_path": "/nowhere/fit.bin"}, "weights_not_found", "not readable"),
        ({"weights_sha256": "0" * 64}, "weights_sha256_mismatch", "check that it is the file"),
        ({"weights_path": None, "weights_sha256": "0" * 64}, "weights_sha256_without_file", ""),
    ],
    ids=["missing file", "wrong sha256", "sha256 without a file"],
)
def test_unverifiable_weights_are_refused_and_nothing_is_written(
    app: App, weights: Path, fields: dict[str, Any], code: str, says: str
) -> None:
    before = app.http.get("/v1/calculators", headers=app.headers).json()
    refused = app.http.post(
        "/v1/calculators",
        json=record(**{"weights_path": str(weights), **fields}),
        headers=app.headers,
    )
    assert refused.status_code == 422, refused.text
    assert refused.json()["code"] == code and says in refused.json()["detail"]
    assert app.http.get("/v1/calculators", headers=app.headers).json() == before


def test_unknown_version_is_404_naming_it(app: App) -> None:
    missing = app.http.get("/v1/calculators/emt/9", headers=app.headers)
    assert missing.status_code == 404 and "emt@9" in missing.json()["detail"]
