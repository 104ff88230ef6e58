"""Task runners: each wraps ASE's own machinery for one task kind."""

from __future__ import annotations

from collections.abc import Callable
from typing import Protocol

from ase import Atoms
from ase.calculators.calculator import Calculator

from atomq.results import RelaxResult, SinglePointResult
from atomq.tasks import Relax, SinglePoint
from atomq_workers.runners.relax import run_relax
from atomq_workers.runners.single_point import run_single_point


class Reporter(Protocol):
    """Receives progress; may raise to stop the run (cancel, time limit)."""

    def __call__(
        self, step: int, total_steps: int, energy: float | None, fmax: float | None
    ) -> None: ...


def run_task(
    atoms: Atoms, calculator: Calculator, task: SinglePoint | Relax, report: Reporter
) -> SinglePointResult | RelaxResult:
    runner: Callable[..., SinglePointResult | RelaxResult] = (
        run_single_point if isinstance(task, SinglePoint) else run_relax
    )
    atoms.calc = calculator
    return runner(atoms, task, report)
