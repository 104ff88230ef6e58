"""Backends load through entry points, and the seeded models mean what their notes say."""

from __future__ import annotations

import numpy as np
import pytest
from ase.build import bulk
from ase.calculators.emt import EMT

from atomq_service.registry import DEFAULT_CALCULATORS
from atomq_workers.backends import Backend, BackendUnavailable, load_backend


def seeded(name: str) -> dict:
    return next(record for record in DEFAULT_CALCULATORS if record["name"] == name)


@pytest.mark.parametrize("record", DEFAULT_CALCULATORS, ids=lambda r: r["name"])
def test_every_seeded_backend_loads_through_its_entry_point(record: dict) -> None:
    backend = load_backend(record["backend"])
    assert isinstance(backend, Backend)
    calculator = backend.make(dict(record["parameters"]), None)
    symbol = record["elements"][0] if record["name"] != "emt" else "Cu"
    atoms = bulk(symbol, "fcc", a=5.26 if symbol == "Ar" else 3.61)
    atoms.calc = calculator
    assert np.isfinite(atoms.get_potential_energy())


def test_unknown_backend_is_reported_not_crashed() -> None:
    with pytest.raises(BackendUnavailable, match="no backend 'no-such-backend'"):
        load_backend("no-such-backend")


def test_emt_backend_is_ase_emt() -> None:
    atoms = bulk("Cu", "fcc", a=3.6).repeat(2)
    atoms.rattle(0.05, seed=1)
    reference = atoms.copy()
    reference.calc = EMT()
    atoms.calc = load_backend("emt").make({}, None)
    assert atoms.get_potential_energy() == reference.get_potential_energy()


def test_seeded_argon_is_within_one_percent_of_the_lattice_sum() -> None:
    record = seeded("lj-argon")
    sigma, epsilon = record["parameters"]["sigma"], record["parameters"]["epsilon"]
    # fcc lattice sums A12 = 12.13188, A6 = 14.45392 (Kittel, Introduction to Solid State
    # Physics, ch. 3). At the nearest-neighbour distance R0 = (2 A12 / A6)^(1/6) sigma the
    # full sum gives U0 = 2 epsilon (A12 (sigma/R0)^12 - A6 (sigma/R0)^6) per atom.
    a12, a6 = 12.13188, 14.45392
    r0 = (2 * a12 / a6) ** (1 / 6) * sigma
    exact = 2 * epsilon * (a12 * (sigma / r0) ** 12 - a6 * (sigma / r0) ** 6)
    atoms = bulk("Ar", "fcc", a=r0 * np.sqrt(2))
    atoms.calc = load_backend("lennard_jones").make(dict(record["parameters"]), None)
    assert atoms.get_potential_energy() == pytest.approx(exact, rel=0.01)


def test_a_worker_does_not_advertise_a_backend_whose_packages_are_missing(tmp_path) -> None:
    from importlib.util import find_spec

    from atomq_service.db import make_engine, transaction
    from atomq_service.registry import register, seed_defaults
    from atomq_service.schema import prepare_schema
    from atomq_workers.main import runnable_calculators

    engine = make_engine(f"sqlite:///{tmp_path / 'atomq.db'}")
    prepare_schema(engine)
    seed_defaults(engine)
    with transaction(engine) as session:
        register(
            session,
            name="sevennet-0",
            version="1",
            backend="sevennet",
            parameters={"checkpoint": "7net-0"},
            elements=["Cu"],
        )
    runnable, skipped = runnable_calculators(engine)
    absent = [m for m in ("sevenn", "torch") if find_spec(m) is None]
    # The entry point itself always imports (its heavy imports wait for `make`), so the
    # worker must check the modules: without them it must not take ML jobs.
    if absent:
        assert "sevennet-0@1" not in runnable
        assert skipped["sevennet-0@1"] == f"backend 'sevennet' needs {', '.join(absent)}"
    else:
        assert "sevennet-0@1" in runnable
    assert "emt@1" in runnable
