"""atomq's code identity in provenance and in PROV-JSON, jobs run in-process with the
worker's own code: from this checkout (git, run here, is the reference), as a release
install would record it, and in records stored before the fields existed."""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
from pathlib import Path
from typing import Any

import pytest
from ase.build import bulk

import atomq
from atomq import JobCreate, Provenance, SinglePoint, Structure
from atomq.version import CodeIdentity
from atomq_workers import provenance as worker_provenance
from atomq_workers.execute import run_job
from tests.conftest import App

CHECKOUT = Path(atomq.__file__).resolve().parents[2]
FIXTURE = Path(__file__).parents[1] / "fixtures" / "pre_migration" / "atomq.db"


def git(*arguments: str) -> str:
    return subprocess.run(
        ["git", "-C", str(CHECKOUT), *arguments], capture_output=True, text=True, check=True
    ).stdout.strip()


def run_one(app: App) -> tuple[Provenance, dict[str, Any]]:
    """A Cu single point run here; its provenance and the worker agent of its PROV-JSON."""
    body = JobCreate(
        structure=Structure.from_atoms(bulk("Cu")), task=SinglePoint(), calculator="emt"
    )
    answer = app.http.post(
        "/v1/jobs",
        content=body.model_dump_json(),
        headers={**app.headers, "Content-Type": "application/json"},
    )
    assert answer.status_code == 201, answer.text
    job_id = answer.json()["id"]
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    provenance = Provenance.model_validate(
        app.http.get(f"/v1/jobs/{job_id}/provenance", headers=app.headers).json()
    )
    document = app.http.get(f"/v1/jobs/{job_id}/prov-json", headers=app.headers).json()
    (worker,) = [a for a in document["agent"].values() if a["prov:type"] == "prov:SoftwareAgent"]
    return provenance, worker


@pytest.mark.skipif(shutil.which("git") is None, reason="needs git")
def test_a_job_run_from_this_checkout_names_its_commit_and_dirty_flag(app: App) -> None:
    if git("rev-parse", "--is-inside-work-tree") != "true":
        pytest.skip("atomq is not imported from a git checkout here")
    provenance, worker = run_one(app)
    head = git("rev-parse", "HEAD")
    dirty = bool(git("status", "--porcelain", "--untracked-files=no"))

    assert provenance.atomq_commit == head
    assert provenance.atomq_dirty is dirty
    assert provenance.packages["atomq"].endswith(f"+g{head[:9]}" + (".dirty" if dirty else ""))
    assert worker["atomq:commit"] == head and worker["atomq:dirty"] is dirty


def test_a_release_install_records_its_version_and_no_commit(
    app: App, monkeypatch: pytest.MonkeyPatch
) -> None:
    release = CodeIdentity(version="1.4.0", commit=None, dirty=None)
    monkeypatch.setattr(worker_provenance, "code_identity", lambda: release)
    provenance, worker = run_one(app)

    assert provenance.packages["atomq"] == "1.4.0"
    assert provenance.atomq_commit is None and provenance.atomq_dirty is None
    assert "atomq:commit" not in worker and "atomq:dirty" not in worker  # no placeholders


def test_records_stored_before_the_fields_existed_still_read() -> None:
    """Provenance written by atomq at 780447e (the committed fixture) has no commit."""
    with sqlite3.connect(FIXTURE) as connection:
        stored = [row[0] for row in connection.execute("SELECT provenance FROM jobresult")]
    assert stored
    for text in stored:
        assert "atomq_commit" not in text
        record = Provenance.model_validate_json(text)
        assert record.atomq_commit is None and record.atomq_dirty is None
