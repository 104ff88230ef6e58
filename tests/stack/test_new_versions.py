"""Versions registered while workers run are served without restarting them: the worker's
heartbeat takes them up (heartbeat.py), honouring each worker's --calculators."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.calculators.morse import MorsePotential

from atomq import Client, SinglePoint
from atomq.admin import CalculatorCreate
from atomq.jobs import WorkerPublic
from atomq_service.users import add_user
from tests.stack.conftest import Stack
from tests.stack.test_registry_and_workers import eventually

pytestmark = pytest.mark.stack


def parent_of(pid: int) -> int:
    """The parent process of a running process, as Linux reports it."""
    status = Path(f"/proc/{pid}/status").read_text()
    return int(next(line for line in status.splitlines() if line.startswith("PPid:")).split()[1])


def worker_named(client: Client, name: str) -> WorkerPublic | None:
    return next((worker for worker in client.workers() if worker.name == name), None)


def test_versions_registered_later_are_served_by_the_running_workers(
    redis_stack: Stack, tmp_path: Path
) -> None:
    client = redis_stack.client()
    admin = Client(redis_stack.url, add_user(redis_stack.engine, "ada-admin", role="admin"))
    first = eventually(client.workers, what="the first worker")[0]
    redis_stack.start_worker(calculators=["emt"])  # every emt version, nothing else
    emt_only = eventually(
        lambda: next((w for w in client.workers() if w.name != first.name), None),
        what="the emt-only worker",
    )

    admin.register_calculator(
        CalculatorCreate(
            name="emt",
            version="7",
            backend="emt",
            parameters={"asap_cutoff": True},
            elements=["Cu"],
        )
    )
    admin.register_calculator(
        CalculatorCreate(
            name="morse-cu",
            version="9",
            backend="morse",
            parameters={"epsilon": 0.35, "r0": 2.6, "rho0": 6.0},
            elements=["Cu"],
        )
    )
    # A version no worker can run: its weights file changed after registration.
    weights = tmp_path / "shared" / "emt-lab.bin"
    weights.parent.mkdir()
    weights.write_bytes(b"made-up weights of the Brackenfield group's fitted model\n")
    admin.register_calculator(
        CalculatorCreate(
            name="emt-lab", version="8", backend="emt", elements=["Cu"], weights_path=str(weights)
        )
    )
    weights.write_bytes(b"overwritten by mistake\n")
    changed_sha256 = hashlib.sha256(weights.read_bytes()).hexdigest()  # reference: hashlib

    def taken_up(name: str, refs: set[str], unavailable: set[str]) -> WorkerPublic | None:
        worker = worker_named(client, name)
        if worker is None or not refs <= set(worker.calculators):
            return None
        return worker if unavailable <= set(worker.unavailable) else None

    # Heartbeats every 0.5 s (tests.stack.conftest): a few of them at most.
    everything = eventually(
        lambda: taken_up(first.name, {"emt@7", "morse-cu@9"}, {"emt-lab@8"}),
        timeout_s=15,
        what="the first worker to take up the new versions",
    )
    assert everything.pid == first.pid and everything.started_at == first.started_at
    assert changed_sha256 in everything.unavailable["emt-lab@8"]
    only_emt = eventually(
        lambda: taken_up(emt_only.name, {"emt@7"}, set()),
        timeout_s=15,
        what="the emt-only worker to take up emt@7",
    )
    # Its selection is kept: versions of other names are neither served nor checked.
    assert set(only_emt.calculators) == {"emt@1", "emt@7"} and only_emt.unavailable == {}

    # The jobs run in the worker processes started before the versions existed (the OS
    # says whose child each job's process is); morse-cu@9 only the first serves.
    atoms = bulk("Cu", "fcc", a=3.6)
    emt_job = client.submit(atoms, SinglePoint(), calculator="emt@7")
    morse_job = client.submit(atoms, SinglePoint(), calculator="morse-cu@9")
    assert emt_job.wait(60).state == "succeeded" and morse_job.wait(60).state == "succeeded"
    started = {process.pid for process in redis_stack.processes[1:]}
    assert {first.pid, emt_only.pid} == started  # the very processes the test started
    assert all(process.poll() is None for process in redis_stack.processes)  # none restarted
    assert parent_of(emt_job.provenance().pid) in started
    assert parent_of(morse_job.provenance().pid) == first.pid
    # References: ASE's EMT and Morse with the registered parameters, run here.
    atoms.calc = EMT(asap_cutoff=True)
    assert emt_job.result().energy == atoms.get_potential_energy()
    atoms.calc = MorsePotential(epsilon=0.35, r0=2.6, rho0=6.0)
    assert morse_job.result().energy == atoms.get_potential_energy()
    listed = {c.ref: c for c in client.calculators()}
    assert set(listed["emt@7"].workers) == {first.name, emt_only.name}
    assert listed["morse-cu@9"].workers == [first.name]
