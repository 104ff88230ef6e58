"""MD through the service against the same run with ASE in-process.

Workload: 256-atom Cu fcc (4x4x4 cubic), EMT, NVE from 300 K, 2 fs, 2000 steps, frames
and thermo rows every 10 steps. The in-process reference does the same sampling (thermo
row with stress, extxyz frame) so both sides do the same work; BLAS single-threaded on
both sides, as in the workers. Prints both wall times and their ratio.

    python bench/md_overhead.py [--broker redis://127.0.0.1:6379/12]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from ase.build import bulk
from ase.calculators.emt import EMT
from threadpoolctl import threadpool_limits

from atomq import MD, Client
from atomq_service.embedded import EmbeddedStack
from atomq_service.settings import Settings
from atomq_workers.runners.md import make_integrator, prepare_velocities, thermo_row, write_frame

TASK = MD(
    ensemble="nve",
    temperature_K=300,
    timestep_fs=2.0,
    steps=2000,
    seed=7,
    frame_interval=10,
    thermo_interval=10,
)


def in_process(scratch: Path) -> float:
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((4, 4, 4))
    atoms.calc = EMT()
    start = time.perf_counter()
    with threadpool_limits(limits=1), (scratch / "direct.extxyz").open("w") as frames:
        rng = np.random.default_rng(TASK.seed)
        prepare_velocities(atoms, TASK, rng)
        dynamics = make_integrator(atoms, TASK, rng)

        def sample() -> None:
            if dynamics.nsteps % 10 == 0:
                energy = atoms.get_potential_energy()
                thermo_row(atoms, dynamics.nsteps, dynamics.nsteps * 2.0, energy, True)
                write_frame(frames, atoms, energy, True)

        dynamics.attach(sample, interval=1)
        dynamics.run(TASK.steps)
    return time.perf_counter() - start


def through_service(scratch: Path, broker: str | None) -> float:
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((4, 4, 4))
    settings = Settings(data_dir=scratch / "data", broker_url=broker)
    with (
        EmbeddedStack(settings, port=8793, workers=1, quiet=True) as stack,
        Client(stack.url, stack.token) as client,
    ):
        client.submit(
            bulk("Cu", cubic=True), TASK.model_copy(update={"steps": 10}), calculator="emt"
        ).result(60)
        start = time.perf_counter()
        client.submit(atoms, TASK, calculator="emt").result(timeout=3600)
        return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--broker", default=None)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        os.environ["ATOMQ_CONFIG"] = str(Path(scratch) / "client.json")
        direct = in_process(Path(scratch))
        service = through_service(Path(scratch), args.broker)
    print(
        f"in-process {direct:.2f} s, through the service {service:.2f} s, "
        f"ratio {service / direct:.3f}"
    )


if __name__ == "__main__":
    main()
