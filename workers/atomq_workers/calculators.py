"""The per-process calculator cache: each worker child builds a calculator once."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ase.calculators.calculator import Calculator

from atomq_service.models import Calculator as CalculatorRecord
from atomq_workers.artifacts import sha256_of
from atomq_workers.backends import Backend, load_backend


class WeightsMismatch(RuntimeError):
    """The weights file on this machine is not the one registered."""


@dataclass
class LoadedCalculator:
    record: CalculatorRecord
    backend: Backend
    calculator: Calculator
    weights: Path | None = None

    def fresh(self) -> Calculator:
        """Another instance of the same version (NEB gives each image its own, as ASE
        recommends: a calculator's neighbour-list history shows in the last digits)."""
        return self.backend.make(dict(self.record.parameters), self.weights)


_cache: dict[str, LoadedCalculator] = {}


def get_calculator(record: CalculatorRecord) -> LoadedCalculator:
    """Return the cached calculator for this exact version, loading it on first use."""
    loaded = _cache.get(record.ref)
    if loaded is not None:
        return loaded
    backend = load_backend(record.backend)
    weights = Path(record.weights_path) if record.weights_path else None
    if weights is not None and record.weights_sha256 is not None:
        actual = sha256_of(weights)
        if actual != record.weights_sha256:
            raise WeightsMismatch(
                f"weights file {weights} has sha256 {actual}, but {record.ref} was registered "
                f"with {record.weights_sha256}; restore the registered file"
            )
    calculator = backend.make(dict(record.parameters), weights)
    loaded = LoadedCalculator(record, backend, calculator, weights)
    _cache[record.ref] = loaded
    return loaded
