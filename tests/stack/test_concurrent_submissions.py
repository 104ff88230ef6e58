"""Many members submitting at once against two API processes sharing one SQLite file.

The usual session-per-request pattern loses inserts here ("database is locked"); WAL
and BEGIN IMMEDIATE (db.py) must give every submission its row.
"""

from __future__ import annotations

import os
import signal
import subprocess
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest
from ase.build import bulk
from sqlalchemy import func
from sqlmodel import Session, select

from atomq import JobCreate, SinglePoint, Structure
from atomq_service.db import make_engine
from atomq_service.embedded import api_command
from atomq_service.models import Job
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.users import add_user
from tests.conftest import free_port

pytestmark = pytest.mark.stack

SUBMISSIONS = 200


def test_concurrent_posts_to_two_api_processes_all_land(tmp_path: Path, redis_url: str) -> None:
    database_url = f"sqlite:///{tmp_path / 'atomq.db'}"
    engine = make_engine(database_url)
    prepare_schema(engine)
    seed_defaults(engine)
    token = add_user(engine, "ines-member")
    port = free_port()
    env = {**os.environ, "ATOMQ_DATABASE_URL": database_url, "ATOMQ_BROKER_URL": redis_url}
    api = subprocess.Popen(
        api_command("127.0.0.1", port, processes=2),
        env=env,
        start_new_session=True,
        stderr=subprocess.PIPE,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"{url}/v1/health", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            assert time.monotonic() < deadline, "the API did not start"
            time.sleep(0.1)

        body = JobCreate(
            structure=Structure.from_atoms(bulk("Cu")), task=SinglePoint(), calculator="emt"
        ).model_dump_json()
        headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}

        def post(_: int) -> int:
            with httpx.Client(timeout=60) as http:
                answer = http.post(f"{url}/v1/jobs", content=body, headers=headers)
                assert answer.status_code == 201, answer.text
                return int(answer.json()["id"])

        with ThreadPoolExecutor(max_workers=32) as pool:
            ids = list(pool.map(post, range(SUBMISSIONS)))
    finally:
        os.killpg(api.pid, signal.SIGTERM)
        api.wait(30)
    assert len(set(ids)) == SUBMISSIONS
    with Session(engine) as session:
        assert session.exec(select(func.count()).select_from(Job)).one() == SUBMISSIONS
    engine.dispose()
