"""`atomq demo`: start the embedded service and run a small study through it.

The scenario is made up: the Brackenfield alloy group screens Cu-Ni-Al
compositions with a cheap classical potential before spending time on better
models. Every job goes through the real HTTP API, broker and worker processes.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import numpy as np
from ase import Atoms
from ase.build import bulk

from atomq import CellRelax, Client, Relax, SinglePoint
from atomq_service.embedded import EmbeddedStack
from atomq_service.settings import Settings

CAUTION = (
    "Simulated numbers from a model potential; validate them against experiment or higher-level "
    "theory before any design or safety decision."
)


def demo_structures() -> list[tuple[str, Atoms, SinglePoint | Relax]]:
    """Pure metals with their cells relaxed, and rattled alloy cells."""
    relax_cell = Relax(fmax=0.005, cell=CellRelax())
    work: list[tuple[str, Atoms, SinglePoint | Relax]] = [
        (f"{symbol} fcc lattice", bulk(symbol, "fcc", a=a0, cubic=True), relax_cell)
        for symbol, a0 in (("Cu", 3.65), ("Ni", 3.55), ("Al", 4.0))
    ]
    rng = np.random.default_rng(2026)
    for label, fractions in (
        ("Cu75Ni25", {"Cu": 24, "Ni": 8}),
        ("Cu50Ni25Al25", {"Cu": 16, "Ni": 8, "Al": 8}),
    ):
        atoms = bulk("Cu", "fcc", a=3.62, cubic=True).repeat((2, 2, 2))
        symbols = [s for s, n in fractions.items() for _ in range(n)]
        rng.shuffle(symbols)
        atoms.set_chemical_symbols(symbols)
        atoms.rattle(stdev=0.05, seed=int(rng.integers(1_000_000)))
        work.append((f"{label} random alloy, single point", atoms.copy(), SinglePoint()))
        work.append((f"{label} random alloy, relaxed", atoms, Relax(fmax=0.01, cell=CellRelax())))
    return work


def run_demo(settings: Settings, port: int = 8766) -> int:
    with tempfile.TemporaryDirectory(prefix="atomq-demo-") as scratch:
        if settings.database_url is None and "data_dir" not in settings.model_fields_set:
            settings = settings.model_copy(update={"data_dir": Path(scratch)})
        os.environ.setdefault("ATOMQ_CONFIG", str(Path(scratch) / "client.json"))
        with EmbeddedStack(settings, port=port, workers=2, quiet=True) as stack:
            print(f"embedded atomq running at {stack.url} (data in {stack.settings.data_dir})")
            with Client(stack.url, stack.token) as client:
                submitted = [
                    (label, client.submit(atoms, task, calculator="emt", tags=["demo", "cu-ni-al"]))
                    for label, atoms, task in demo_structures()
                ]
                print(f"submitted {len(submitted)} jobs\n")
                print(f"{'job':>4}  {'structure':<38} {'E/atom (eV)':>12} {'a (A)':>8}  converged")
                for label, job in submitted:
                    result = job.result(timeout=300)
                    atoms = result.structure.to_atoms()
                    a = float(np.cbrt(atoms.get_volume() / len(atoms) * 4))  # fcc: 4 atoms/cube
                    converged = getattr(result, "converged", None)
                    print(
                        f"{job.id:>4}  {label:<38} {result.energy / len(atoms):>12.5f} "
                        f"{a:>8.4f}  {'' if converged is None else converged}"
                    )
                last = submitted[0][1]
                print(f"\nprovenance of job {last.id}:")
                print(json.dumps(last.provenance().model_dump(mode="json"), indent=2))
        print(f"\n{CAUTION}")
    return 0
