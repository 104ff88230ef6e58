"""`atomq verify` finds an artifact whose bytes no longer match the recorded sha256."""

from __future__ import annotations

import os
import subprocess
import sys

from ase.build import bulk

from atomq import MD, JobCreate, Structure
from atomq_service.verify import verify_artifacts
from atomq_workers.execute import run_job
from tests.conftest import App


def test_a_flipped_byte_is_reported(app: App) -> None:
    task = MD(ensemble="nve", temperature_K=300, timestep_fs=2, steps=20, seed=3, frame_interval=5)
    body = JobCreate(
        structure=Structure.from_atoms(bulk("Cu", cubic=True).repeat(2)),
        task=task,
        calculator="emt",
    )
    headers = {**app.headers, "Content-Type": "application/json"}
    created = app.http.post("/v1/jobs", content=body.model_dump_json(), headers=headers)
    job_id = created.json()["id"]
    assert run_job(app.engine, job_id, app.settings).state == "succeeded"
    store = app.settings.artifacts_dir
    assert verify_artifacts(app.engine, store) == (2, [])

    trajectory = next(store.glob(f"{job_id}/attempt-1/trajectory.extxyz"))
    data = bytearray(trajectory.read_bytes())
    data[100] ^= 0x01  # one bit, as disk corruption would
    trajectory.write_bytes(bytes(data))

    checked, problems = verify_artifacts(app.engine, store)
    assert checked == 2 and len(problems) == 1
    assert problems[0].name == "trajectory.extxyz" and problems[0].job_id == job_id
    assert "sha256 is" in problems[0].problem

    env = {**os.environ, "ATOMQ_DATA_DIR": str(app.settings.data_dir)}
    cli = subprocess.run(
        [sys.executable, "-m", "atomq.cli", "verify"], env=env, capture_output=True, text=True
    )
    assert cli.returncode == 1
    assert "trajectory.extxyz" in cli.stdout and "1 do not match" in cli.stdout
