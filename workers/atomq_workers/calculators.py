"""The per-process calculator cache: each worker child builds a calculator version once.

Importing and loading an ML model costs seconds and hundreds of MB to GB, so a loaded
calculator stays for the next job of the same version. The cache holds versions in
least-recently-used order under a memory budget (ATOMQ_MODEL_CACHE_MB): after a load
grows the process beyond it, the versions used longest ago are dropped. The weights
file is checked against its registered sha256 when a version loads, not on every job.
"""

from __future__ import annotations

import gc
import os
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

from ase.calculators.calculator import Calculator

from atomq_service.models import Calculator as CalculatorRecord
from atomq_workers.artifacts import sha256_of
from atomq_workers.backends import Backend, BackendUnavailable, load_backend
from atomq_workers.provenance import package_version


class WeightsMismatch(RuntimeError):
    """The weights file on this machine is not the one registered."""


@dataclass
class LoadedCalculator:
    record: CalculatorRecord
    backend: Backend
    calculator: Calculator
    weights: Path | None = None
    size_bytes: int = 0  # memory it took when it loaded (see CalculatorCache.get)

    def fresh(self) -> Calculator:
        """Another instance of the same version (NEB gives each image its own, as ASE
        recommends: a calculator's neighbour-list history shows in the last digits)."""
        return self.backend.make(dict(self.record.parameters), self.weights)


def verified_weights(record: CalculatorRecord, backend: Backend) -> Path | None:
    """The weights file this version loads here, after checking it is the registered one."""
    weights = backend.weights_file(dict(record.parameters), record.weights_path)
    if weights is None or record.weights_sha256 is None:
        return weights
    if not weights.is_file():
        raise WeightsMismatch(
            f"weights file {weights} of {record.ref} is not on this machine; copy the "
            "registered file there (or run this version on a worker that has it)"
        )
    actual = sha256_of(weights)
    if actual != record.weights_sha256:
        raise WeightsMismatch(
            f"weights file {weights} has sha256 {actual}, but {record.ref} was registered "
            f"with {record.weights_sha256}; restore the registered file, or register the "
            "new file as a new version"
        )
    return weights


def why_not_runnable(record: CalculatorRecord) -> str | None:
    """None if this machine can run the version; else the reason, for the worker's record
    (backend importable, its modules present, weights present with the registered hash)."""
    try:
        backend = load_backend(record.backend)
    except BackendUnavailable as exc:
        return str(exc)
    missing = backend.missing(record.parameters)
    if missing:
        return f"backend {record.backend!r} needs {', '.join(missing)}, not installed here"
    pinned = record.version.removeprefix(f"{backend.package}-")
    if pinned != record.version and pinned != package_version(backend.package):
        # A version named after its package release (gfn2-xtb@tblite-0.5.0) runs only there.
        return (
            f"{record.ref} is {backend.package} {pinned}, but this machine has "
            f"{backend.package} {package_version(backend.package)}"
        )
    try:
        verified_weights(record, backend)
    except (WeightsMismatch, BackendUnavailable, ValueError) as exc:
        return str(exc)
    return None


def resident_bytes() -> int:
    """This process's resident memory (Linux /proc; 0 where it is not available)."""
    try:
        with open("/proc/self/statm") as statm:
            return int(statm.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return 0


def tensor_bytes(calculator: object) -> int:
    """Bytes of a torch model's parameters and buffers behind an ASE calculator (its
    `model`, or a D3 sum's base model); 0 for calculators without one."""
    model = getattr(getattr(calculator, "base", calculator), "model", None)
    tensors = [
        *getattr(model, "parameters", lambda: [])(),
        *getattr(model, "buffers", lambda: [])(),
    ]
    return sum(int(t.numel()) * int(t.element_size()) for t in tensors)


class CalculatorCache:
    """Loaded calculator versions, least recently used first, within a memory budget."""

    def __init__(self, budget_bytes: int) -> None:
        self.budget_bytes = budget_bytes
        self._loaded: OrderedDict[str, LoadedCalculator] = OrderedDict()
        self.loads = 0  # how many versions this process has loaded (evictions reload)

    def get(self, record: CalculatorRecord) -> LoadedCalculator:
        loaded = self._loaded.get(record.ref)
        if loaded is not None:
            self._loaded.move_to_end(record.ref)
            return loaded
        backend = load_backend(record.backend)
        weights = verified_weights(record, backend)
        before = resident_bytes()
        calculator = backend.make(dict(record.parameters), weights)
        # The process's growth, or the model's own tensors where that says more (memory
        # freed by an evicted model is reused without the process growing).
        size = max(resident_bytes() - before, tensor_bytes(calculator), 0)
        loaded = LoadedCalculator(record, backend, calculator, weights, size)
        self._loaded[record.ref] = loaded
        self.loads += 1
        self._evict(keep=record.ref)
        return loaded

    def _evict(self, keep: str) -> None:
        while self.used_bytes() > self.budget_bytes:
            oldest = next((ref for ref in self._loaded if ref != keep), None)
            if oldest is None:  # the version just loaded stays, even alone over budget
                return
            del self._loaded[oldest]
            gc.collect()  # drop the model's tensors now, before the next one loads

    def used_bytes(self) -> int:
        return sum(loaded.size_bytes for loaded in self._loaded.values())

    def refs(self) -> list[str]:
        """Cached versions, least recently used first."""
        return list(self._loaded)


_cache: CalculatorCache | None = None


def get_calculator(record: CalculatorRecord, budget_mb: int = 8192) -> LoadedCalculator:
    """This process's cached calculator for this exact version, loading it on first use."""
    global _cache
    if _cache is None:
        _cache = CalculatorCache(budget_mb * 1024 * 1024)
    return _cache.get(record)
