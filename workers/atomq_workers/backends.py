"""Calculator backends: how a registered record becomes an ASE calculator.

A backend is published under the entry-point group `atomq.calculators`; the
registry names it. A lab adds its own by shipping a package with such an entry
point, whose object is a `Backend`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from importlib.metadata import entry_points
from importlib.util import find_spec
from pathlib import Path
from typing import Any

from ase.calculators.calculator import Calculator
from ase.calculators.emt import EMT
from ase.calculators.lj import LennardJones
from ase.calculators.morse import MorsePotential

ENTRY_POINT_GROUP = "atomq.calculators"


@dataclass(frozen=True)
class Backend:
    """make(parameters, weights_path) returns a fresh ASE calculator."""

    name: str
    package: str  # the distribution whose version goes into provenance
    make: Callable[[dict[str, Any], Path | None], Calculator]
    # Modules `make` imports: a worker lacking one must not advertise this backend.
    requires: tuple[str, ...] = ()
    # Further distributions whose versions a result's provenance records (torch, ...).
    runtime_packages: tuple[str, ...] = ()
    # For a record without a weights path: the file inside an installed package that these
    # parameters load (a shipped checkpoint), so its sha256 can be checked; None: no file.
    shipped_weights: Callable[[dict[str, Any]], Path | None] | None = None

    def weights_file(self, parameters: dict[str, Any], registered: str | None) -> Path | None:
        """The weights file a record loads on this machine: its registered path, else the
        checkpoint shipped in the backend's package, else none."""
        if registered:
            return Path(registered)
        return self.shipped_weights(parameters) if self.shipped_weights else None

    def missing(self, parameters: dict[str, Any]) -> list[str]:
        """Modules this backend, with these parameters, needs but this machine lacks.
        A "d3" parameter adds dispersion from the dftd3 package."""
        needed = [*self.requires, *(["dftd3"] if "d3" in parameters else [])]
        return [module for module in needed if not _importable(module)]


def _importable(module: str) -> bool:
    try:
        return find_spec(module) is not None
    except (ImportError, ValueError):  # a blocked or broken installation
        return False


class BackendUnavailable(RuntimeError):
    """The backend is not installed or cannot be imported on this machine."""


def _emt(parameters: dict[str, Any], _weights: Path | None) -> Calculator:
    return EMT(**parameters)


def _lennard_jones(parameters: dict[str, Any], _weights: Path | None) -> Calculator:
    return LennardJones(**parameters)


def _morse(parameters: dict[str, Any], _weights: Path | None) -> Calculator:
    return MorsePotential(**parameters)


EMT_BACKEND = Backend("emt", "ase", _emt)
LENNARD_JONES_BACKEND = Backend("lennard_jones", "ase", _lennard_jones)
MORSE_BACKEND = Backend("morse", "ase", _morse)


def load_backend(name: str) -> Backend:
    """Find a backend by entry-point name; BackendUnavailable says why it cannot load."""
    found = entry_points(group=ENTRY_POINT_GROUP, name=name)
    if not found:
        raise BackendUnavailable(
            f"no backend {name!r} in entry-point group {ENTRY_POINT_GROUP!r} on this machine; "
            "install the package that provides it"
        )
    entry = next(iter(found))
    try:
        backend = entry.load()
    except Exception as exc:  # an optional dependency (torch, ...) may be missing
        raise BackendUnavailable(f"backend {name!r} failed to import: {exc}") from exc
    if not isinstance(backend, Backend):
        raise BackendUnavailable(f"entry point {entry.value} is not an atomq Backend")
    return backend
