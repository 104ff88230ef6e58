"""`atomq serve` with no configuration: SQLite, embedded Redis and workers from one command."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT

from atomq import Client, SinglePoint
from atomq.results import Provenance
from atomq_service.db import make_engine
from tests.conftest import free_port

pytestmark = pytest.mark.stack


def processes_mentioning(text: str) -> list[int]:
    """Pids of live processes whose command line mentions `text`."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit() or int(entry.name) == os.getpid():
            continue
        try:
            cmdline = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode()
            state = (entry / "stat").read_text().split()[2]
        except OSError:
            continue
        if text in cmdline and state != "Z":
            found.append(int(entry.name))
    return found


def test_serve_runs_a_job_and_ctrl_c_stops_everything(tmp_path: Path) -> None:
    data_dir = tmp_path / "lab-data"
    config = Path(os.environ["ATOMQ_CONFIG"])  # set per test by the autouse fixture
    port = free_port()
    env = {**os.environ, "ATOMQ_CONFIG": str(config)}
    env.pop("ATOMQ_BROKER_URL", None)
    env.pop("ATOMQ_DATABASE_URL", None)
    log = (tmp_path / "serve.log").open("wb")
    serve = subprocess.Popen(
        [sys.executable, "-m", "atomq.cli", "serve", "--data-dir", str(data_dir),
         "--port", str(port), "--workers", "1"],
        env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
    )  # fmt: skip
    try:
        deadline = time.monotonic() + 60
        while not config.exists() or not _healthy(port):
            assert serve.poll() is None, (tmp_path / "serve.log").read_text()
            assert time.monotonic() < deadline, "atomq serve did not come up"
            time.sleep(0.2)
        # The embedded server wrote a client config for this machine's user.
        stored = json.loads(config.read_text())
        assert stored["url"] == f"http://127.0.0.1:{port}"
        assert (config.stat().st_mode & 0o777) == 0o600
        assert (data_dir / "atomq.db").exists()

        atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat((2, 2, 2))
        atoms.rattle(stdev=0.05, seed=11)
        with Client() as client:  # URL and token from the config file
            job = client.submit(atoms, SinglePoint(), calculator="emt")
            computed = job.atoms(timeout=120)
            calculator = job.provenance().calculator
        reference = atoms.copy()
        reference.calc = EMT()
        # Reference: ASE's EMT in this process; the embedded stack must agree bit for bit.
        assert computed.get_potential_energy() == reference.get_potential_energy()
        assert np.array_equal(computed.get_forces(), reference.get_forces())
        assert calculator == "emt@1"
    finally:
        # What a terminal's Ctrl-C does: SIGINT to the whole foreground process group.
        os.killpg(serve.pid, signal.SIGINT)
        code = serve.wait(60)
    output = (tmp_path / "serve.log").read_text()
    assert code == 0, output
    # The embedded broker runs in its own session; find it by the socket it served.
    broker = next(line for line in output.splitlines() if line.startswith("broker:"))
    socket_path = broker.split("://", 1)[1]
    assert socket_path.endswith(".socket") or socket_path.endswith(".sock"), broker
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and (
        processes_mentioning(str(data_dir)) or processes_mentioning(socket_path)
    ):
        time.sleep(0.2)
    assert processes_mentioning(str(data_dir)) == [], "a server process outlived atomq serve"
    assert processes_mentioning(socket_path) == [], "the embedded Redis outlived atomq serve"
    assert not _healthy(port)


def _healthy(port: int) -> bool:
    try:
        return httpx.get(f"http://127.0.0.1:{port}/v1/health", timeout=1).status_code == 200
    except httpx.HTTPError:
        return False


def test_sql_broker_fallback_runs_jobs(tmp_path: Path) -> None:
    """Where no Redis can be had, the embedded stack falls back to kombu's SQL transport."""
    from atomq_service.embedded import EmbeddedStack
    from atomq_service.settings import Settings

    settings = Settings(
        data_dir=tmp_path, broker_url=f"sqla+sqlite:///{tmp_path / 'broker.sqlite'}"
    )
    atoms = bulk("Cu", "fcc", a=3.6)
    reference = atoms.copy()
    reference.calc = EMT()
    with (
        EmbeddedStack(settings, port=free_port(), workers=1, quiet=True) as stack,
        Client(stack.url, stack.token) as client,
    ):
        result = client.submit(atoms, SinglePoint(), calculator="emt").result(timeout=120)
    # Reference: ASE's EMT in this process.
    assert result.energy == reference.get_potential_energy()


def test_serve_upgrades_an_old_data_dir_after_a_backup(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A data directory written by atomq at 780447e (the committed fixture, before schema
    revisions): `atomq serve` backs it up, upgrades it and serves its old jobs, their
    provenance and their files as they were; new jobs run beside them."""
    import shutil
    import sqlite3

    from atomq_service.embedded import EmbeddedStack
    from atomq_service.settings import Settings
    from atomq_service.verify import verify_artifacts

    fixture = Path(__file__).parents[1] / "fixtures" / "pre_migration"
    data_dir = tmp_path / "old-lab"
    data_dir.mkdir()
    shutil.copy(fixture / "atomq.db", data_dir / "atomq.db")
    shutil.copytree(fixture / "artifacts", data_dir / "artifacts")
    with sqlite3.connect(fixture / "atomq.db") as old:
        stored_provenance = dict(old.execute("SELECT job_id, provenance FROM jobresult"))

    settings = Settings(data_dir=data_dir)
    with (
        EmbeddedStack(settings, port=free_port(), workers=1, quiet=True) as stack,
        Client(stack.url, stack.token) as client,
    ):
        told = capsys.readouterr().err
        assert "atomq: database backed up to" in told and "upgraded from" in told, told
        assert client.jobs(limit=100).total == 14
        for job_id, text in stored_provenance.items():
            assert client.job(job_id).provenance() == Provenance.model_validate_json(text)
        frames = client.job(3).trajectory()  # the old MD run's file, checked by its sha256
        assert len(frames) == 5
        atoms = bulk("Ni", "fcc", a=3.52)
        result = client.submit(atoms, SinglePoint(), calculator="emt").result(timeout=120)
        reference = atoms.copy()
        reference.calc = EMT()
        assert result.energy == reference.get_potential_energy()  # ASE in this process
    checked, problems = verify_artifacts(make_engine(settings.resolved_database_url),
                                         settings.artifacts_dir)  # fmt: skip
    assert checked >= 5 and problems == []
    (backup,) = (data_dir / "backups").iterdir()
    with sqlite3.connect(backup) as copy:
        assert dict(copy.execute("SELECT job_id, provenance FROM jobresult")) == stored_provenance
        assert "alembic_version" not in {
            n for (n,) in copy.execute("SELECT name FROM sqlite_master")
        }
