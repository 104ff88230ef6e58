"""The tight-binding and machine-learned backends against the packages' own calculators
and against experiment.

Each test needs the package it exercises (tblite, dftd3, sevenn, chgnet) and skips with
the `pip install` that brings it; the checks of the module itself run everywhere.
Workers run one thread per process (`atomq_workers.main.SINGLE_THREAD`), and so do these
tests: with more threads torch sums forces in a varying order and their last float32
digits change from call to call.
"""

from __future__ import annotations

import hashlib
import importlib
import subprocess
import sys
import warnings
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk, molecule
from ase.calculators.calculator import Calculator
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS

from atomq_workers.backends import BackendUnavailable
from atomq_workers.backends_ml import (
    CHGNET_BACKEND,
    MPTRJ_ELEMENTS,
    SEVENN_BACKEND,
    TBLITE_BACKEND,
    add_d3,
    checkpoint_metadata,
    missing_modules,
    package_versions,
    shipped_checkpoints,
)

HEAVY = ("torch", "sevenn", "chgnet", "tblite", "dftd3")
D3_PBE = {"method": "PBE", "damping": "d3bj"}


def need(module: str, distribution: str) -> Any:
    return pytest.importorskip(
        module, reason=f"{distribution} is not installed: `pip install {distribution}`"
    )


@pytest.fixture(scope="module", autouse=True)
def _one_torch_thread() -> Iterator[None]:
    try:
        torch = importlib.import_module("torch")
    except ImportError:
        yield
        return
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def rattled_cu(repeat: int = 2) -> Atoms:
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(repeat)
    atoms.rattle(0.05, seed=3)
    return atoms


def evaluate(atoms: Atoms, calculator: Calculator) -> tuple[float, np.ndarray, np.ndarray | None]:
    """Energy, forces and (for periodic cells) stress of a copy of `atoms`."""
    atoms = atoms.copy()
    atoms.calc = calculator
    stress = atoms.get_stress() if atoms.pbc.all() else None
    return atoms.get_potential_energy(), atoms.get_forces(), stress


def assert_identical(ours: tuple, theirs: tuple) -> None:
    """Bit for bit: the same file through the same code must give the same numbers."""
    assert ours[0] == theirs[0]
    np.testing.assert_array_equal(ours[1], theirs[1])
    np.testing.assert_array_equal(ours[2], theirs[2])


# -- the module itself (no heavy package needed) -----------------------------------------
def test_module_and_checkpoint_listing_import_no_heavy_package() -> None:
    # A fresh interpreter, so packages other tests imported do not count.
    code = (
        "import sys, atomq_workers.backends_ml as m; m.shipped_checkpoints(); "
        f"print(sorted(k for k in sys.modules if k.split('.')[0] in {HEAVY!r}))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


@pytest.mark.parametrize(
    ("backend", "parameters", "hidden", "install"),
    [
        (TBLITE_BACKEND, {"method": "GFN2-xTB"}, "tblite.ase", "pip install tblite"),
        (SEVENN_BACKEND, {"checkpoint": "7net-0"}, "sevenn.calculator", "pip install sevenn"),
        (CHGNET_BACKEND, {"model": "0.3.0"}, "chgnet.model", "pip install chgnet"),
    ],
    ids=["tblite", "sevennet", "chgnet"],
)
def test_missing_package_says_what_to_install(
    backend: Any, parameters: dict, hidden: str, install: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, hidden, None)  # None in sys.modules: import fails
    with pytest.raises(BackendUnavailable, match=install):
        backend.make(parameters, None)


def test_missing_dftd3_says_what_to_install(monkeypatch: pytest.MonkeyPatch) -> None:
    from ase.calculators.emt import EMT

    monkeypatch.setitem(sys.modules, "dftd3.ase", None)
    with pytest.raises(BackendUnavailable, match="pip install dftd3"):
        add_d3(EMT(), D3_PBE)


@pytest.mark.parametrize(
    ("backend", "parameters", "message"),
    [
        (TBLITE_BACKEND, {"method": "GFN3-xTB"}, "method must be one of"),
        (TBLITE_BACKEND, {"temperature": 300}, "unknown parameter.*temperature"),
        (TBLITE_BACKEND, {"d3": D3_PBE}, "already contains D3"),
        (TBLITE_BACKEND, {"max_iterations": 0}, "max_iterations must be a positive whole"),
        (TBLITE_BACKEND, {"electronic_temperature": "hot"}, "must be a positive number"),
        (SEVENN_BACKEND, {}, "needs a weights file or parameters.checkpoint"),
        # Known to sevenn but downloaded on first use: refused, nothing is fetched.
        (SEVENN_BACKEND, {"checkpoint": "7net-omni"}, "not a checkpoint shipped"),
        (SEVENN_BACKEND, {"checkpoint": "7net-0", "cutoff": 6}, "unknown parameter.*cutoff"),
        (CHGNET_BACKEND, {"model": "0.4.0"}, "model must be one of"),
        (CHGNET_BACKEND, {}, "needs a weights file or parameters.model"),
        (CHGNET_BACKEND, {"model": "0.3.0", "d3": "PBE"}, "d3 must be a mapping"),
        (CHGNET_BACKEND, {"model": "0.3.0", "d3": {"method": "PBE"}}, "'damping' among"),
    ],
)
def test_bad_parameters_are_refused_with_the_reason(
    backend: Any, parameters: dict, message: str
) -> None:
    with pytest.raises(ValueError, match=message):
        backend.make(parameters, None)


def test_d3_method_unknown_to_dftd3_is_refused_before_any_calculation() -> None:
    need("dftd3.ase", "dftd3")
    from ase.calculators.emt import EMT

    with pytest.raises(ValueError, match="dftd3 has no d3bj parameters for method 'PBE-typo'"):
        add_d3(EMT(), {"method": "PBE-typo", "damping": "d3bj"})


def test_missing_modules_names_what_each_backend_needs() -> None:
    # find_spec is the outside reference: the answer must match what the machine has.
    from importlib.util import find_spec

    missing = missing_modules("sevennet", {"d3": D3_PBE})
    for module in ("sevenn", "torch", "dftd3"):
        assert (module in missing) == (find_spec(module) is None)
    assert missing_modules("emt") == []


def test_provenance_packages_add_dftd3_only_with_d3() -> None:
    assert set(package_versions("chgnet", {"model": "0.3.0"})) == {"chgnet", "torch", "pymatgen"}
    assert "dftd3" in package_versions("chgnet", {"model": "0.3.0", "d3": D3_PBE})


# -- tblite: GFN2-xTB ----------------------------------------------------------------------
def test_gfn2_water_geometry_matches_experiment_and_tblite_itself() -> None:
    tblite_ase = need("tblite.ase", "tblite")
    water = molecule("H2O")
    water.calc = TBLITE_BACKEND.make({"method": "GFN2-xTB"}, None)
    BFGS(water, logfile=None).run(fmax=0.005)
    # Experimental gas-phase water: r(O-H) = 0.9578 A, angle H-O-H = 104.48 deg (NIST
    # CCCBDB, experimental geometry). GFN2-xTB opens the angle by about 3 deg (a recalled
    # rule of thumb for the method, not a cited value), hence the wider angle tolerance.
    for hydrogen in (1, 2):
        assert water.get_distance(0, hydrogen) == pytest.approx(0.9578, abs=0.02)
    assert water.get_angle(1, 0, 2) == pytest.approx(104.48, abs=3.5)

    # Same geometry, fresh calculators (tblite restarts its SCF from the previous step's
    # wavefunction, so a calculator's history shows in the last digits): tblite's own ASE
    # calculator, with its defaults (printing off), gives identical numbers.
    relaxed = water.copy()
    reference = evaluate(relaxed, tblite_ase.TBLite(method="GFN2-xTB", verbosity=0))
    ours = evaluate(relaxed, TBLITE_BACKEND.make({"method": "GFN2-xTB"}, None))
    assert ours[0] == reference[0]
    np.testing.assert_array_equal(ours[1], reference[1])


def test_gfn1_is_a_different_hamiltonian() -> None:
    tblite_ase = need("tblite.ase", "tblite")
    water = molecule("H2O")
    gfn1 = evaluate(water, TBLITE_BACKEND.make({"method": "GFN1-xTB"}, None))[0]
    # tblite's own calculator is the reference; GFN1 and GFN2 total energies differ by
    # about 19 eV for water (tblite's documentation example, -157.0 vs -138.0 eV).
    assert gfn1 == evaluate(water, tblite_ase.TBLite(method="GFN1-xTB", verbosity=0))[0]
    assert gfn1 != pytest.approx(evaluate(water, TBLITE_BACKEND.make({}, None))[0], abs=1.0)


def test_xtb_options_reach_tblite() -> None:
    tblite_ase = need("tblite.ase", "tblite")
    water = molecule("H2O")
    options = {"electronic_temperature": 5000.0, "accuracy": 0.1, "max_iterations": 100}
    ours = evaluate(water, TBLITE_BACKEND.make(options, None))[0]
    # tblite's own calculator with the same options is the reference; its defaults differ.
    assert ours == evaluate(water, tblite_ase.TBLite(**options, verbosity=0))[0]
    assert ours != evaluate(water, tblite_ase.TBLite(verbosity=0))[0]


# -- SevenNet ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def sevennet_0() -> Calculator:
    need("sevenn.calculator", "sevenn")
    return SEVENN_BACKEND.make({"checkpoint": "7net-0"}, None)


def test_sevennet_equals_sevenns_own_calculator(sevennet_0: Calculator) -> None:
    calculator_module = need("sevenn.calculator", "sevenn")
    atoms = rattled_cu()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # sevenn's note that no GPU kernel is enabled
        reference = calculator_module.SevenNetCalculator(model="7net-0", device="cpu")
    assert_identical(evaluate(atoms, sevennet_0), evaluate(atoms, reference))


def test_sevennet_copper_lattice_constant_within_two_percent_of_experiment(
    sevennet_0: Calculator,
) -> None:
    atoms = bulk("Cu", "fcc", a=3.55)  # the one-atom primitive cell, deliberately strained
    atoms.calc = sevennet_0
    converged = BFGS(FrechetCellFilter(atoms), logfile=None).run(fmax=0.005, steps=100)
    assert converged
    lattice = (4 * atoms.get_volume()) ** (1 / 3)  # primitive fcc cell volume is a^3 / 4
    # Cu fcc, a = 3.61 A (Ashcroft & Mermin, Solid State Physics, table 4.1).
    assert lattice == pytest.approx(3.61, rel=0.02)


def test_sevennet_d3_is_the_model_plus_dftd3(sevennet_0: Calculator) -> None:
    dftd3_ase = need("dftd3.ase", "dftd3")
    atoms = rattled_cu()
    combined = SEVENN_BACKEND.make({"checkpoint": "7net-0", "d3": D3_PBE}, None)
    total = evaluate(atoms, combined)
    model = evaluate(atoms, sevennet_0)
    dispersion = evaluate(atoms, dftd3_ase.DFTD3(**D3_PBE))  # dftd3's own calculator
    assert total[0] == model[0] + dispersion[0]
    np.testing.assert_array_equal(total[1], model[1] + dispersion[1])
    np.testing.assert_array_equal(total[2], model[2] + dispersion[2])
    assert dispersion[0] < 0  # dispersion binds: a check that D3 was really added
    assert combined.d3 == D3_PBE  # kept for provenance


def test_multi_fidelity_checkpoint_needs_its_modal() -> None:
    need("sevenn.calculator", "sevenn")
    with pytest.raises(ValueError, match="modal"):
        SEVENN_BACKEND.make({"checkpoint": "7net-mf-0"}, None)


# -- CHGNet -----------------------------------------------------------------------------------
def cu_ni_al() -> Atoms:
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True)
    atoms.symbols[1], atoms.symbols[2] = "Ni", "Al"
    atoms = atoms.repeat((2, 1, 1))
    atoms.rattle(0.03, seed=5)
    return atoms


def test_chgnet_versions_equal_chgnets_own_and_differ_from_each_other() -> None:
    chgnet_model = need("chgnet.model", "chgnet")
    atoms = cu_ni_al()
    energies = {}
    for version in ("0.2.0", "0.3.0"):
        ours = evaluate(atoms, CHGNET_BACKEND.make({"model": version}, None))
        network = chgnet_model.CHGNet.load(model_name=version, use_device="cpu", verbose=False)
        reference = chgnet_model.CHGNetCalculator(model=network, use_device="cpu")
        assert_identical(ours, evaluate(atoms, reference))  # chgnet's own calculator
        energies[version] = ours[0]
    # A version swap must show in the numbers: well beyond float32 rounding (~1e-5 eV here).
    assert abs(energies["0.2.0"] - energies["0.3.0"]) > 1e-3


# -- checkpoints shipped in the packages --------------------------------------------------------
def shipped(backend: str) -> list:
    found = [c for c in shipped_checkpoints() if c.backend == backend]
    if not found:
        package = {"sevennet": "sevenn", "chgnet": "chgnet"}[backend]
        pytest.skip(
            f"no {backend} checkpoints: {package} is not installed (`pip install {package}`)"
        )
    return found


def test_shipped_checkpoints_have_true_hashes_and_unique_refs() -> None:
    found = shipped("sevennet") + shipped("chgnet")
    assert len({c.ref for c in found}) == len(found)
    for checkpoint in found:
        data = checkpoint.weights_path.read_bytes()
        assert checkpoint.weights_sha256 == hashlib.sha256(data).hexdigest()
        assert checkpoint.size_bytes == len(data)


def test_checkpoint_metadata_agrees_with_torch_load() -> None:
    torch = need("torch", "torch")
    checkpoint = next(c for c in shipped("sevennet") if c.parameters["checkpoint"] == "7net-0")
    ours = checkpoint_metadata(checkpoint.weights_path)["config"]
    theirs = torch.load(checkpoint.weights_path, weights_only=False, map_location="cpu")["config"]
    assert ours["chemical_species"] == theirs["chemical_species"]
    # Two independent sources for the MPtrj element set: SevenNet-0's own checkpoint and
    # the list CHGNet's records use (recalled from memory).
    assert checkpoint.elements == MPTRJ_ELEMENTS


def test_multi_fidelity_records_follow_the_models_modal_map() -> None:
    records = [c for c in shipped("sevennet") if c.parameters["checkpoint"] == "7net-mf-0"]
    calculator = SEVENN_BACKEND.make(
        {"modal": records[0].parameters["modal"]}, records[0].weights_path
    )
    # sevenn's loaded model is the reference for which fidelities exist.
    assert sorted(c.parameters["modal"] for c in records) == sorted(calculator.model.modal_map)


def test_a_shipped_record_loads_through_its_weights_file() -> None:
    chgnet_model = need("chgnet.model", "chgnet")
    record = {c.parameters["model"]: c for c in shipped("chgnet")}["0.2.0"]
    atoms = cu_ni_al()
    # The record's parameters must rebuild the 0.2.0 network as chgnet's own loader does
    # (0.2.0 keeps an output-layer bias that later versions dropped).
    ours = evaluate(atoms, CHGNET_BACKEND.make(record.parameters, record.weights_path))
    network = chgnet_model.CHGNet.load(model_name="0.2.0", use_device="cpu", verbose=False)
    reference = chgnet_model.CHGNetCalculator(model=network, use_device="cpu")
    assert_identical(ours, evaluate(atoms, reference))
