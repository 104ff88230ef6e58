"""Calculator versions and the workers that run them, through real worker processes:
what each worker advertises, why a job waits, and what retiring a version keeps."""

from __future__ import annotations

import hashlib
import os
import signal
import time
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT

from atomq import Client, SinglePoint
from atomq.errors import InvalidRequest
from atomq_service.db import transaction
from atomq_service.registry import register
from atomq_service.users import add_user
from tests.stack.conftest import Stack
from tests.stack.test_cli import atomq

pytestmark = pytest.mark.stack
T = TypeVar("T")
CLASSICAL = {"emt@1", "lj-argon@1", "morse-cu@1"}


def eventually(probe: Callable[[], T | None], timeout_s: float = 30, what: str = "") -> T:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = probe()
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


def cu_single_point(client: Client, calculator: str) -> int:
    return client.submit(bulk("Cu", "fcc", a=3.6), SinglePoint(), calculator=calculator).id


def test_worker_advertises_its_calculators_and_counts_their_jobs(redis_stack: Stack) -> None:
    client = redis_stack.client()
    workers = eventually(client.workers, what="the worker's record")
    assert len(workers) == 1
    worker = workers[0]
    assert set(worker.calculators) >= CLASSICAL
    emt = client.calculator("emt@1")
    assert emt.workers == [worker.name]
    assert emt.jobs_run == 0

    job = client.job(cu_single_point(client, "emt"))
    job.wait(60)
    assert client.calculator("emt@1").jobs_run == 1
    assert client.calculator("morse-cu@1").jobs_run == 0
    listed = {c.ref: c for c in client.calculators()}
    assert listed["emt@1"].jobs_run == 1 and listed["emt@1"].workers == [worker.name]


def test_job_no_worker_can_run_waits_with_its_reason_until_one_can(redis_stack: Stack) -> None:
    client = redis_stack.client()
    # The stack's worker serves every version, later ones too: in its place, one started
    # for emt@1 alone, which a new emt version is not meant for.
    os.killpg(redis_stack.processes[1].pid, signal.SIGTERM)
    redis_stack.processes[1].wait(30)
    redis_stack.start_worker(calculators=["emt@1"])
    eventually(
        lambda: [w for w in client.workers() if w.calculators == ["emt@1"]],
        what="the emt@1 worker",
    )
    with transaction(redis_stack.engine) as session:
        register(
            session,
            name="emt",
            version="2",
            backend="emt",
            parameters={"asap_cutoff": True},
            elements=["Cu"],
        )
    job = client.job(cu_single_point(client, "emt@2"))
    time.sleep(2)  # ample time for a worker that could take it (heartbeats every 0.5 s)
    info = job.info()
    assert info.state == "queued" and info.attempts == 0
    assert info.waiting_reason is not None
    assert "no live worker can run emt@2" in info.waiting_reason
    assert "started for other calculators" in info.waiting_reason

    redis_stack.start_worker(calculators=["emt@2"])
    job.wait(60)
    assert job.info().waiting_reason is None
    # Reference: ASE's EMT with the registered parameter, run directly in-process.
    atoms = bulk("Cu", "fcc", a=3.6)
    atoms.calc = EMT(asap_cutoff=True)
    assert job.result().energy == atoms.get_potential_energy()
    second = [w for w in client.workers() if w.calculators == ["emt@2"]]
    assert len(second) == 1, "the second worker serves only the version it was started for"


def test_a_stopped_worker_is_gone_and_queued_jobs_say_so(redis_stack: Stack) -> None:
    client = redis_stack.client()
    eventually(client.workers, what="the worker's record")
    worker_process = redis_stack.processes[1]  # [0] is the API
    os.killpg(worker_process.pid, signal.SIGTERM)
    worker_process.wait(30)
    eventually(lambda: not client.workers(), what="the stopped worker to drop out")
    job = client.job(cu_single_point(client, "emt"))
    reason = job.info().waiting_reason
    assert reason is not None and reason.startswith("no worker is running")


def test_a_worker_killed_without_goodbye_drops_out_after_missed_heartbeats(
    redis_stack: Stack,
) -> None:
    client = redis_stack.client()
    eventually(client.workers, what="the worker's record")
    os.killpg(redis_stack.processes[1].pid, signal.SIGKILL)  # no shutdown hook runs
    # Three missed heartbeats of 0.5 s (tests.stack.conftest) and it no longer counts.
    eventually(lambda: not client.workers(), timeout_s=10, what="the dead worker to drop out")
    assert client.calculator("emt@1").workers == []


def test_retired_version_refuses_new_jobs_and_keeps_its_history(redis_stack: Stack) -> None:
    client = redis_stack.client()
    old = client.job(cu_single_point(client, "emt@1"))
    old.wait(60)
    with transaction(redis_stack.engine) as session:
        register(session, name="emt", version="2", backend="emt", elements=["Cu"])
    admin = Client(redis_stack.url, add_user(redis_stack.engine, "ada-admin", role="admin"))
    with pytest.raises(InvalidRequest) as needs_successor:
        admin.retire_calculator("emt@1")  # the default version of emt: name the next one
    assert "new_default: one of 2" in str(needs_successor.value)
    retired = admin.retire_calculator("emt@1", new_default="2")
    assert retired.retired and retired.jobs_run == 1

    with pytest.raises(InvalidRequest) as refused:
        cu_single_point(client, "emt@1")
    assert "emt@1 is retired" in str(refused.value) and "use emt@2" in str(refused.value)
    # Unpinned, the name now means the successor named at retirement.
    assert client.job(cu_single_point(client, "emt")).info().calculator == "emt@2"
    # The old job keeps its result and the provenance that names the retired version.
    provenance = old.provenance()
    assert provenance.calculator == "emt@1"
    atoms = bulk("Cu", "fcc", a=3.6)
    atoms.calc = EMT()
    assert np.array_equal(old.result().forces, atoms.get_forces())


def test_registry_commands_add_show_and_retire_a_version(
    redis_stack: Stack, tmp_path: Path
) -> None:
    weights = tmp_path / "shared" / "lab-weights.bin"
    weights.parent.mkdir()
    weights.write_bytes(b"made-up weights of the Brackenfield group's fitted model\n")
    admin = {"ATOMQ_TOKEN": add_user(redis_stack.engine, "ada-admin", role="admin")}

    added = atomq(
        redis_stack, "calculators", "add", "emt-lab@2026-12", "--backend", "emt",
        "--elements", "Cu,Ni", "--elements", "Al", "--weights", str(weights),
        "--notes", "EMT registered with a weights file, for the registry test", env=admin,
    )  # fmt: skip
    assert added.returncode == 0, added.stderr
    # Reference: hashlib over the file's bytes, computed here.
    sha256 = hashlib.sha256(weights.read_bytes()).hexdigest()
    assert f"registered emt-lab@2026-12 (weights sha256 {sha256})" in added.stdout

    shown = atomq(redis_stack, "calculators", "show", "emt-lab@2026-12")
    assert shown.returncode == 0, shown.stderr
    assert sha256 in shown.stdout and str(weights) in shown.stdout
    assert "elements    Cu Ni Al" in shown.stdout  # as given, both --elements forms joined

    again = atomq(
        redis_stack, "calculators", "add", "emt-lab@2026-12", "--backend", "emt",
        "--elements", "Cu", env=admin,
    )  # fmt: skip
    assert again.returncode != 0 and "already registered and cannot change" in again.stderr

    member = atomq(redis_stack, "calculators", "retire", "emt-lab@2026-12")
    assert member.returncode != 0 and "admin" in member.stderr
    retired = atomq(redis_stack, "calculators", "retire", "emt-lab@2026-12", env=admin)
    assert retired.returncode == 0, retired.stderr
    listing = atomq(redis_stack, "calculators")
    line = next(row for row in listing.stdout.splitlines() if row.startswith("emt-lab@"))
    assert "retired" in line
