"""Tight-binding and machine-learned backends: tblite (GFN-xTB), SevenNet, CHGNet, plus D3.

Each backend is a `Backend` for the entry-point group `atomq.calculators`, like the
built-ins in `backends.py`. torch, sevenn, chgnet, tblite and dftd3 are imported only
inside `make`, so this module imports on every worker (and in the service, which may
call `shipped_checkpoints()`); a worker without the package gets `BackendUnavailable`
naming the `pip install` that brings it.

Nothing here downloads anything: a checkpoint is either a registered weights file or one
that ships inside the installed sevenn / chgnet package, found on disk by its known
relative path.

Dispersion: any backend wrapped with `with_d3` accepts a parameter
`"d3": {"method": "PBE", "damping": "d3bj"}` and returns ASE's SumCalculator of the model
and dftd3's DFTD3. Because the settings live in the record's parameters, provenance
records them with the rest; `package_versions` adds dftd3's version.

Model output is not engineering data: these potentials need validation against
experiment or higher-level theory for the system at hand before any design or safety
decision.
"""

from __future__ import annotations

import collections
import contextlib
import functools
import io
import pickle
import warnings
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from importlib import import_module
from importlib.util import find_spec
from pathlib import Path
from types import ModuleType
from typing import Any, cast

from ase.calculators.calculator import Calculator
from ase.calculators.mixing import SumCalculator
from ase.data import atomic_numbers, chemical_symbols

from atomq_workers.artifacts import sha256_of
from atomq_workers.backends import Backend, BackendUnavailable
from atomq_workers.provenance import package_version

Make = Callable[[dict[str, Any], Path | None], Calculator]


# -- shared helpers -------------------------------------------------------------------
def _require(module: str, distribution: str) -> ModuleType:
    """Import an optional heavy module, or say which package to install."""
    try:
        return import_module(module)
    except ImportError as exc:
        raise BackendUnavailable(
            f"{module} cannot be imported on this worker ({exc}); "
            f"install it with `pip install {distribution}`"
        ) from exc


def _check_keys(backend: str, parameters: dict[str, Any], allowed: set[str]) -> None:
    unknown = sorted(set(parameters) - allowed)
    if unknown:
        raise ValueError(
            f"{backend} backend: unknown parameter(s) {', '.join(unknown)}; "
            f"allowed: {', '.join(sorted(allowed))}"
        )


def _package_dir(module: str) -> Path | None:
    """Where an installed package lies, found without importing it (and so without torch)."""
    spec = find_spec(module)
    if spec is None or not spec.submodule_search_locations:
        return None
    return Path(next(iter(spec.submodule_search_locations)))


# -- D3 dispersion ----------------------------------------------------------------------
# dftd3's damping names and the parameter classes that hold their per-method values.
D3_DAMPINGS = {
    "d3bj": "RationalDampingParam",
    "d3zero": "ZeroDampingParam",
    "d3bjm": "ModifiedRationalDampingParam",
    "d3zerom": "ModifiedZeroDampingParam",
    "d3op": "OptimizedPowerDampingParam",
}
D3_KEYS = {"method", "damping", "params_tweaks", "realspace_cutoff"}


class D3Corrected(SumCalculator):
    """A model plus DFT-D3 dispersion, summed by ASE's SumCalculator.

    `d3` keeps the settings as registered, and the results carry `energy_contributions`
    (model first, D3 second), so both parts can be shown and recorded.
    """

    def __init__(self, base: Calculator, d3: dict[str, Any]) -> None:
        self.d3 = _checked_d3(d3)
        dftd3_ase = _require("dftd3.ase", "dftd3")
        _check_d3_table(self.d3)
        self.base = base
        super().__init__([base, dftd3_ase.DFTD3(**self.d3)])


def _checked_d3(d3: Any) -> dict[str, Any]:
    """The shape of the D3 settings, checked without dftd3 (and before any model loads)."""
    if not isinstance(d3, dict):
        raise ValueError('d3 must be a mapping such as {"method": "PBE", "damping": "d3bj"}')
    _check_keys("d3", d3, D3_KEYS)
    method, damping = d3.get("method"), d3.get("damping")
    if not isinstance(method, str) or damping not in D3_DAMPINGS:
        raise ValueError(
            "d3 needs a functional name as 'method' (for example 'PBE') and a 'damping' "
            f"among {', '.join(D3_DAMPINGS)}; got method={method!r}, damping={damping!r}"
        )
    return dict(d3)


def _check_d3_table(d3: dict[str, Any]) -> None:
    """Refuse a method dftd3 has no parameters for now, not at the first calculation."""
    if "params_tweaks" in d3:  # explicit damping parameters: dftd3's table is not consulted
        return
    interface = _require("dftd3.interface", "dftd3")
    try:
        getattr(interface, D3_DAMPINGS[d3["damping"]])(method=d3["method"])
    except RuntimeError as exc:
        raise ValueError(
            f"dftd3 has no {d3['damping']} parameters for method {d3['method']!r} ({exc}); "
            "use a functional it tabulates, for example 'PBE'"
        ) from exc


def add_d3(calculator: Calculator, d3: dict[str, Any]) -> D3Corrected:
    """Any ASE calculator plus D3 dispersion with dftd3's settings `d3`."""
    return D3Corrected(calculator, d3)


def with_d3(make: Make) -> Make:
    """Wrap a backend's `make` so that an optional `"d3"` parameter adds D3 dispersion."""

    @functools.wraps(make)
    def make_with_d3(parameters: dict[str, Any], weights: Path | None) -> Calculator:
        parameters = dict(parameters)  # the record's own dict stays as registered
        d3 = parameters.pop("d3", None)
        if d3 is not None:
            _checked_d3(d3)  # bad settings fail before a model spends seconds loading
        base = make(parameters, weights)
        if d3 is None:
            return base
        # SumCalculator derives from ASE's BaseCalculator, not Calculator; the runners use
        # only what both have (properties, reset).
        return cast(Calculator, add_d3(base, d3))

    return make_with_d3


# -- tblite: GFN1-xTB and GFN2-xTB ----------------------------------------------------------
XTB_METHODS = ("GFN2-xTB", "GFN1-xTB")
# tblite options atomq passes through, each a positive number; True: a whole number.
XTB_OPTIONS = {"accuracy": False, "electronic_temperature": False, "max_iterations": True}
# Both GFN1-xTB and GFN2-xTB are parametrised for H to Rn, Z = 1-86 (Bannwarth, Ehlert
# and Grimme, J. Chem. Theory Comput. 15, 1652 (2019); recalled from memory).
XTB_ELEMENTS: list[str] = chemical_symbols[1:87]


def _tblite(parameters: dict[str, Any], weights: Path | None) -> Calculator:
    """GFN-xTB from tblite; unset options keep tblite's own defaults.

    GFN-xTB is made for molecules and non-metallic solids: on slightly rattled bulk copper
    tblite's SCF did not converge in 250 cycles (bench/ml_backends.py), so a job ends
    failed there rather than giving a number.
    """
    if "d3" in parameters:
        raise ValueError(
            "tblite backend: GFN1-xTB already contains D3 and GFN2-xTB D4 dispersion; "
            "remove the 'd3' parameter"
        )
    _check_keys("tblite", parameters, {"method", *XTB_OPTIONS})
    for key, whole in XTB_OPTIONS.items():
        value = parameters.get(key, 1)
        kinds = int if whole else (int, float)
        if isinstance(value, bool) or not isinstance(value, kinds) or value <= 0:
            kind = "whole number" if whole else "number"
            raise ValueError(f"tblite backend: {key} must be a positive {kind}, not {value!r}")
    if weights is not None:
        raise ValueError("tblite backend takes no weights file; register it without one")
    method = parameters.get("method", "GFN2-xTB")
    if method not in XTB_METHODS:
        raise ValueError(f"tblite backend: method must be one of {XTB_METHODS}, not {method!r}")
    tblite_ase = _require("tblite.ase", "tblite")
    # verbosity 0: the SCF printout would otherwise fill the worker's log at every step.
    xtb: Calculator = tblite_ase.TBLite(**{**parameters, "method": method}, verbosity=0)
    return xtb


# -- SevenNet --------------------------------------------------------------------------------
@dataclass(frozen=True)
class _SevennetShipped:
    checkpoint: str  # the name sevenn itself accepts
    file: str  # relative to the sevenn package
    registry_name: str
    registry_version: str
    note: str


# What sevenn 0.13 ships in its wheel (pretrained_potentials/), looked up in the package;
# the other names sevenn knows are downloaded on first use, so atomq does not offer them.
SEVENNET_SHIPPED = (
    _SevennetShipped(
        "7net-0",
        "pretrained_potentials/SevenNet_0__11Jul2024/checkpoint_sevennet_0.pth",
        "sevennet-0",
        "2024-07-11",
        "SevenNet-0, release of 11 July 2024 (what sevenn calls 7net-0), trained on MPtrj "
        "(PBE/PBE+U).",
    ),
    _SevennetShipped(
        "7net-0_22May2024",
        "pretrained_potentials/SevenNet_0__22May2024/checkpoint_sevennet_0.pth",
        "sevennet-0",
        "2024-05-22",
        "SevenNet-0, earlier release of 22 May 2024, trained on MPtrj (PBE/PBE+U).",
    ),
    _SevennetShipped(
        "7net-l3i5",
        "pretrained_potentials/SevenNet_l3i5/checkpoint_l3i5.pth",
        "sevennet-l3i5",
        "1",
        "SevenNet-l3i5, trained on MPtrj; angular order l_max 3 where SevenNet-0 has 2 "
        "(sevenn's presets), so larger and slower.",
    ),
    _SevennetShipped(
        "7net-mf-0",
        "pretrained_potentials/SevenNet_MF_0/checkpoint_sevennet_mf_0.pth",
        "sevennet-mf-0",
        "1",
        "SevenNet-MF-0, multi-fidelity: one network, one output per fidelity (modal).",
    ),
)


def _shipped_sevennet_file(checkpoint: str) -> Path:
    """The on-disk file of a checkpoint that ships in the sevenn package."""
    names = {entry.checkpoint.lower(): entry for entry in SEVENNET_SHIPPED}
    entry = names.get(checkpoint.lower())
    if entry is None:
        raise ValueError(
            f"sevennet backend: {checkpoint!r} is not a checkpoint shipped in the sevenn "
            f"package ({', '.join(e.checkpoint for e in SEVENNET_SHIPPED)}); register "
            "other checkpoints as a weights file"
        )
    package = _package_dir("sevenn")
    if package is None:
        raise BackendUnavailable("sevenn is not installed: `pip install sevenn`")
    path = package / entry.file
    if not path.is_file():
        raise BackendUnavailable(f"sevenn's checkpoint {entry.checkpoint} is missing at {path}")
    return path


def _sevennet_shipped_weights(parameters: dict[str, Any]) -> Path | None:
    checkpoint = parameters.get("checkpoint")
    return None if checkpoint is None else _shipped_sevennet_file(str(checkpoint))


def _sevennet(parameters: dict[str, Any], weights: Path | None) -> Calculator:
    """SevenNet on CPU from a registered weights file, or a checkpoint shipped in sevenn.

    With a weights file, `checkpoint` may still name the model for readers; the file is
    what loads. `modal` picks the fidelity of a multi-fidelity model (7net-mf-0: 'PBE'
    or 'R2SCAN').
    """
    _check_keys("sevennet", parameters, {"checkpoint", "modal", "device"})
    checkpoint = parameters.get("checkpoint")
    if weights is None and checkpoint is None:
        raise ValueError(
            "sevennet backend needs a weights file or parameters.checkpoint, one of "
            + ", ".join(e.checkpoint for e in SEVENNET_SHIPPED)
        )
    path = weights if weights is not None else _shipped_sevennet_file(str(checkpoint))
    calculator = _require("sevenn.calculator", "sevenn")
    with warnings.catch_warnings():
        # sevenn warns on every construction that no GPU tensor-product kernel is enabled.
        warnings.filterwarnings("ignore", message="No tensor product accelerator")
        sevennet: Calculator = calculator.SevenNetCalculator(
            model=str(path),  # a path, never a name: a name may trigger a download
            file_type="checkpoint",
            device=parameters.get("device", "cpu"),
            modal=parameters.get("modal"),
        )
    return sevennet


# -- CHGNet ----------------------------------------------------------------------------------
# The checkpoints chgnet 0.4 ships in its wheel, by the model names CHGNet.load accepts.
CHGNET_SHIPPED = {
    "0.3.0": "pretrained/0.3.0/chgnet_0.3.0_e29f68s314m37.pth.tar",
    "0.2.0": "pretrained/0.2.0/chgnet_0.2.0_e30f77s348m32.pth.tar",
    "r2scan": "pretrained/r2scan/chgnet_r2scan_transfer_learning_e15f36s161m23.pth.tar",
}
# MPtrj, the training set of CHGNet and SevenNet-0, covers H to Pu except Po, At, Rn, Fr
# and Ra: 89 elements (recalled from memory; SevenNet-0 stores the same list in its
# checkpoint, and the tests compare the two). CHGNet embeds Z = 1-94 but learned only these.
MPTRJ_ELEMENTS: list[str] = [
    symbol for symbol in chemical_symbols[1:95] if symbol not in {"Po", "At", "Rn", "Fr", "Ra"}
]


def _chgnet(parameters: dict[str, Any], weights: Path | None) -> Calculator:
    """CHGNet on CPU, from a registered weights file or the file shipped for `model`.

    `model` ('0.3.0', '0.2.0', 'r2scan') also tells how to build the network: the 0.2.0
    generation has a bias in its output layer that later ones dropped.
    """
    _check_keys("chgnet", parameters, {"model", "device"})
    model = parameters.get("model")
    if model is not None and model not in CHGNET_SHIPPED:
        raise ValueError(
            f"chgnet backend: model must be one of {', '.join(CHGNET_SHIPPED)}, not {model!r}"
        )
    if weights is None:
        if model is None:
            raise ValueError(
                "chgnet backend needs a weights file or parameters.model, one of "
                + ", ".join(CHGNET_SHIPPED)
            )
        weights = _shipped_chgnet_file(model)
    chgnet_model = _require("chgnet.model", "chgnet")
    # chgnet prints a line on every load; the worker's log needs none of them.
    with contextlib.redirect_stdout(io.StringIO()):
        # The same arguments CHGNet.load uses for its shipped models.
        network = chgnet_model.CHGNet.from_file(
            str(weights), mlp_out_bias=model == "0.2.0", version=model
        )
        chgnet: Calculator = chgnet_model.CHGNetCalculator(
            model=network, use_device=parameters.get("device", "cpu")
        )
    return chgnet


def _shipped_chgnet_file(model: str) -> Path:
    package = _package_dir("chgnet")
    if package is None:
        raise BackendUnavailable("chgnet is not installed: `pip install chgnet`")
    path = package / CHGNET_SHIPPED[model]
    if not path.is_file():
        raise BackendUnavailable(f"chgnet's model {model} is missing at {path}")
    return path


def _chgnet_shipped_weights(parameters: dict[str, Any]) -> Path | None:
    model = parameters.get("model")
    return _shipped_chgnet_file(model) if model in CHGNET_SHIPPED else None


TBLITE_BACKEND = Backend(
    "tblite", "tblite", _tblite, requires=("tblite",), runtime_packages=("tblite",)
)
SEVENN_BACKEND = Backend(
    "sevennet",
    "sevenn",
    with_d3(_sevennet),
    requires=("sevenn", "torch"),
    runtime_packages=("sevenn", "torch", "e3nn"),
    shipped_weights=_sevennet_shipped_weights,
)
CHGNET_BACKEND = Backend(
    "chgnet",
    "chgnet",
    with_d3(_chgnet),
    requires=("chgnet", "torch"),
    runtime_packages=("chgnet", "torch", "pymatgen"),
    shipped_weights=_chgnet_shipped_weights,
)

BACKENDS = {backend.name: backend for backend in (TBLITE_BACKEND, SEVENN_BACKEND, CHGNET_BACKEND)}


def missing_modules(backend: str, parameters: dict[str, Any] | None = None) -> list[str]:
    """Modules this backend (with D3, if asked) needs but this machine lacks; imports none.
    Importing this module never fails, so `load_backend` alone cannot tell."""
    known = BACKENDS.get(backend)
    return known.missing(parameters or {}) if known else []


def package_versions(backend: str, parameters: dict[str, Any]) -> dict[str, str]:
    """Versions of every package a calculator of this backend and parameters runs on."""
    known = BACKENDS.get(backend)
    names = [*(known.runtime_packages if known else ()), *(["dftd3"] if "d3" in parameters else [])]
    return {name: package_version(name) for name in names}


# -- checkpoints shipped inside installed packages -----------------------------------------
@dataclass(frozen=True)
class ShippedCheckpoint:
    """A checkpoint found inside an installed package, with a suggested registry record."""

    name: str
    version: str
    backend: str
    parameters: dict[str, Any]
    weights_path: Path
    weights_sha256: str
    size_bytes: int
    elements: list[str]
    notes: str

    @property
    def ref(self) -> str:
        return f"{self.name}@{self.version}"

    def record(self) -> dict[str, Any]:
        """Keyword arguments for `atomq_service.registry.register`."""
        return {
            "name": self.name,
            "version": self.version,
            "backend": self.backend,
            "parameters": dict(self.parameters),
            "elements": list(self.elements),
            # No path: every worker finds the file in its own installation of the package
            # and checks it against this sha256, so one record serves every machine.
            "weights_path": None,
            "weights_sha256": self.weights_sha256,
            "weights_size": self.size_bytes,
            "notes": self.notes,
        }


class _Inert:
    """Stands in for every class a checkpoint's pickle names (tensors, torch types)."""

    def __new__(cls, *args: Any, **kwargs: Any) -> _Inert:
        return super().__new__(cls)

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        pass

    def __setstate__(self, state: Any) -> None:
        pass


_REAL_CLASSES: dict[tuple[str, str], type] = {
    ("collections", "OrderedDict"): collections.OrderedDict,
    ("builtins", "set"): set,
    ("builtins", "frozenset"): frozenset,
}


class _MetadataUnpickler(pickle.Unpickler):
    """Reads the plain-Python part of a torch checkpoint without torch.

    Only OrderedDict, set and frozenset are real; every other class becomes `_Inert` and
    tensor storages become None, so no code from the file runs and nothing large loads.
    What survives is what we want: dicts, lists, strings and numbers of the metadata.
    """

    def find_class(self, module: str, name: str) -> Any:
        return _REAL_CLASSES.get((module, name), _Inert)

    def persistent_load(self, pid: Any) -> None:
        return None


def checkpoint_metadata(path: Path) -> dict[str, Any]:
    """The top-level dict of a torch zip checkpoint, tensors left out (torch not needed)."""
    with zipfile.ZipFile(path) as archive:
        # torch.save writes <archive name>/data.pkl; the archive name varies.
        pickled = next(name for name in archive.namelist() if name.endswith("/data.pkl"))
        with archive.open(pickled) as handle:
            metadata = _MetadataUnpickler(handle).load()
    return metadata if isinstance(metadata, dict) else {}


def _by_atomic_number(symbols: list[str]) -> list[str]:
    return sorted(symbols, key=atomic_numbers.__getitem__)


def _sevennet_shipped(package: Path) -> list[ShippedCheckpoint]:
    found = []
    for entry in SEVENNET_SHIPPED:
        path = package / entry.file
        if not path.is_file():
            continue
        config = checkpoint_metadata(path).get("config", {})
        sha256, size = sha256_of(path), path.stat().st_size  # once, though modals share it
        detail = (
            f" Elements from the checkpoint's metadata; cutoff {config.get('cutoff')} A; "
            f"trained with sevenn {config.get('version')}. Shipped with the sevenn package "
            f"as {entry.checkpoint!r}."
        )
        # A multi-fidelity model answers at several levels of theory: one record for each.
        modals: list[str | None] = list(config.get("_modal_map") or {}) or [None]
        for modal in modals:
            parameters: dict[str, Any] = {"checkpoint": entry.checkpoint}
            name, notes = entry.registry_name, entry.note + detail
            if modal is not None:
                parameters["modal"] = modal
                name = f"{name}-{modal.lower()}"
                notes = f"{entry.note} This record uses the {modal} fidelity.{detail}"
            found.append(
                ShippedCheckpoint(
                    name=name,
                    version=entry.registry_version,
                    backend=SEVENN_BACKEND.name,
                    parameters=parameters,
                    weights_path=path,
                    weights_sha256=sha256,
                    size_bytes=size,
                    elements=_by_atomic_number(list(config.get("chemical_species", []))),
                    notes=notes,
                )
            )
    return found


def _chgnet_shipped(package: Path) -> list[ShippedCheckpoint]:
    found = []
    for model, relative in CHGNET_SHIPPED.items():
        path = package / relative
        if not path.is_file():
            continue
        model_args = checkpoint_metadata(path).get("model", {}).get("model_args", {})
        training = model_args.get("composition_model", "unknown")
        r2scan = model == "r2scan"
        notes = (
            f"CHGNet {model} shipped with the chgnet package; composition model "
            f"{training!r}, graph cutoff {model_args.get('atom_graph_cutoff')} A. Elements: "
            "MPtrj's 89, CHGNet's pretraining set (the checkpoint does not list them)."
        )
        if r2scan:
            notes += (
                " Transfer-learned to r2SCAN data, whose element coverage may be narrower "
                "than MPtrj's."
            )
        found.append(
            ShippedCheckpoint(
                name="chgnet-r2scan" if r2scan else "chgnet",
                version="1" if r2scan else model,
                backend=CHGNET_BACKEND.name,
                parameters={"model": model},
                weights_path=path,
                weights_sha256=sha256_of(path),
                size_bytes=path.stat().st_size,
                elements=list(MPTRJ_ELEMENTS),
                notes=notes,
            )
        )
    return found


def shipped_checkpoints() -> list[ShippedCheckpoint]:
    """Checkpoints inside the installed sevenn and chgnet packages, ready to register.

    Found by their known paths in each package (no import of torch or of the packages);
    metadata is read from the files themselves. A package not installed adds nothing.
    """
    found: list[ShippedCheckpoint] = []
    sevenn = _package_dir("sevenn")
    if sevenn is not None:
        found += _sevennet_shipped(sevenn)
    chgnet = _package_dir("chgnet")
    if chgnet is not None:
        found += _chgnet_shipped(chgnet)
    return found


def tblite_records() -> list[dict[str, Any]]:
    """Registry records for GFN1-xTB and GFN2-xTB from the installed tblite, one version
    per tblite release (`gfn2-xtb@tblite-0.5.0`): the method's parameters live in the
    package, so a tblite upgrade is a new version. Empty where tblite is not installed."""
    if _package_dir("tblite") is None:
        return []
    version = package_version("tblite")
    return [
        {
            "name": method.lower(),
            "version": f"tblite-{version}",
            "backend": TBLITE_BACKEND.name,
            "parameters": {"method": method},
            "elements": list(XTB_ELEMENTS),
            "notes": f"{method} from tblite {version}, for molecules and non-metallic solids; "
            "far too slow for metal supercells (seconds per 32-atom copper cell, where the "
            "SCF may also fail to converge).",
        }
        for method in XTB_METHODS
    ]
