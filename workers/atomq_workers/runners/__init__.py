"""Task runners: each wraps ASE's own machinery for one task kind."""

from __future__ import annotations

from typing import Protocol

from ase import Atoms

from atomq.results import ResultModel
from atomq.tasks import MD, NEB, Relax, SinglePoint, Task
from atomq_workers.artifacts import ArtifactWriter
from atomq_workers.calculators import LoadedCalculator


class Reporter(Protocol):
    """Receives progress after every step; raises to stop the run (cancel, time limit)."""

    def __call__(
        self,
        step: int,
        total_steps: int,
        *,
        energy: float | None = None,
        fmax: float | None = None,
        temperature_K: float | None = None,
    ) -> None: ...


def run_task(
    atoms: Atoms | None,
    loaded: LoadedCalculator,
    task: Task,
    report: Reporter,
    artifacts: ArtifactWriter,
) -> ResultModel:
    """Run the task; `atoms` is None for NEB, whose endpoints travel in the task."""
    if isinstance(task, NEB):
        from atomq_workers.runners.neb import run_neb

        return run_neb(loaded.fresh, task, report, artifacts)
    calculator = loaded.calculator
    calculator.reset()
    assert atoms is not None
    atoms.calc = calculator
    # Imported here so that a worker only pays for the runners it uses.
    if isinstance(task, SinglePoint):
        from atomq_workers.runners.single_point import run_single_point

        return run_single_point(atoms, task, report)
    if isinstance(task, Relax):
        from atomq_workers.runners.relax import run_relax

        return run_relax(atoms, task, report)
    if isinstance(task, MD):
        from atomq_workers.runners.md import run_md

        return run_md(atoms, task, report, artifacts)
    raise TypeError(f"no runner for task kind {task.kind!r}")
