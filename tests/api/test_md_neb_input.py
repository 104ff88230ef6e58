"""MD and NEB submissions in-process: refusals that name the problem and write nothing,
the seed the service draws and records, and NEB endpoints given inline or as references
to finished jobs.

The broker is `memory://` and no worker runs, so every accepted job stays queued.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import httpx
import pytest
from ase import Atoms
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.constraints import FixAtoms
from ase.optimize import BFGS
from sqlmodel import Session

from atomq.hashing import input_hash
from atomq.results import RelaxResult, RelaxStep
from atomq.structure import Structure
from atomq.tasks import MD
from atomq_service.models import Job as JobRow
from atomq_service.models import JobResult
from tests.conftest import App

# Fcc copper, a = 3.615 Angstrom at room temperature (Kittel, Introduction to Solid State
# Physics, table of lattice constants; recalled from memory). Nearest neighbours are
# a / sqrt(2) = 2.556 Angstrom apart.
CU_A = 3.615


# -- structures ------------------------------------------------------------------------
def copper(repeat: int = 1) -> Atoms:
    """Periodic fcc Cu: 4 atoms in the cubic cell, 4 * repeat^3 in all."""
    atoms: Atoms = bulk("Cu", "fcc", a=CU_A, cubic=True).repeat(repeat)
    return atoms


def copper_cluster() -> Atoms:
    """The four atoms of the cubic cell as a free cluster (no periodicity)."""
    atoms = copper()
    atoms.pbc = False
    return atoms


def copper_with_momenta() -> Atoms:
    atoms = copper(2)
    # 0.01 amu*Angstrom/ASE-time per component, alternating in sign so the total is zero.
    atoms.set_momenta([[0.01 * (-1) ** i] * 3 for i in range(len(atoms))])
    return atoms


def cu3ni(first: str) -> Atoms:
    """An L1_2 Cu3Ni cell (the Cu3Au prototype) with `first` on the corner site; the
    lattice constant is copper's, close enough for an input check."""
    atoms = copper()
    symbols = ["Cu"] * 4
    symbols[0 if first == "Ni" else 1] = "Ni"
    atoms.set_chemical_symbols(symbols)
    return atoms


def vacancy_hop() -> tuple[Atoms, Atoms]:
    """Vacancy migration in a 2x2x2 Cu cell: a vacancy at the origin, then its nearest
    neighbour (at (0, a/2, a/2), 2.556 Angstrom away) moved into it. Same atoms, same
    order, same cell in both, as an NEB needs."""
    initial = copper(2)
    vacancy_site = initial.positions[0].copy()
    del initial[0]
    final = initial.copy()
    final.positions[0] = vacancy_site
    return initial, final


def wire(atoms: Atoms) -> dict[str, Any]:
    return Structure.from_atoms(atoms).model_dump(mode="json")


# -- request bodies ----------------------------------------------------------------------
def md_task(**fields: Any) -> dict[str, Any]:
    """A Langevin run at 300 K unless told otherwise; `None` removes a field."""
    task: dict[str, Any] = {
        "kind": "md",
        "ensemble": "nvt",
        "thermostat": "langevin",
        "temperature_K": 300.0,
        "timestep_fs": 2.0,
        "steps": 100,
    }
    task.update(fields)
    return {key: value for key, value in task.items() if value is not None}


def md_body(atoms: Atoms | None = None, **task_fields: Any) -> dict[str, Any]:
    return {
        "structure": wire(atoms if atoms is not None else copper(2)),
        "task": md_task(**task_fields),
        "calculator": "emt",
    }


def neb_body(
    initial: dict[str, Any] | Atoms, final: dict[str, Any] | Atoms, **fields: Any
) -> dict[str, Any]:
    def endpoint(value: dict[str, Any] | Atoms) -> dict[str, Any]:
        return wire(value) if isinstance(value, Atoms) else value

    return {
        "task": {
            "kind": "neb",
            "initial": endpoint(initial),
            "final": endpoint(final),
            "images": 3,
        },
        "calculator": "emt",
        **fields,
    }


def post_job(app: App, body: dict[str, Any]) -> httpx.Response:
    response: httpx.Response = app.http.post(
        "/v1/jobs",
        content=json.dumps(body),
        headers={**app.headers, "Content-Type": "application/json"},
    )
    return response


def submit(app: App, body: dict[str, Any]) -> dict[str, Any]:
    response = post_job(app, body)
    assert response.status_code == 201, response.text
    created: dict[str, Any] = response.json()
    return created


# -- the bad-input table -----------------------------------------------------------------
@dataclass
class BadInput:
    body: dict[str, Any]
    fragments: list[str]
    code: str = "invalid_input"
    # Prepares the app; returns how many jobs it submitted itself (those rows may stay).
    setup: Callable[[App], int] | None = field(default=None)


def _small_step_limit(app: App) -> int:
    app.settings.max_steps = 100  # this App (and its Settings) belong to this test alone
    return 0


def _short_wall_time(app: App) -> int:
    app.settings.max_wall_time_s = 3600.0
    return 0


def _queued_job(app: App) -> int:
    created = submit(app, md_body())
    assert created["id"] == 1 and created["state"] == "queued"  # the id the case refers to
    return 1


def _without_structure(body: dict[str, Any]) -> dict[str, Any]:
    return {key: value for key, value in body.items() if key != "structure"}


_shrunk = copper()
_shrunk.set_cell(_shrunk.cell * 1.01, scale_atoms=True)
_pinned = copper()
_pinned.set_constraint(FixAtoms(indices=[0]))

BAD_INPUTS: dict[str, BadInput] = {
    # A single atom at rest after its centre-of-mass momentum is removed: ASE's Stationary
    # then rescales 0 K to the target temperature and produces NaN (found in a benchmark).
    "Maxwell-Boltzmann velocities for one atom": BadInput(
        md_body(bulk("Cu")), ["need at least two atoms"], code="too_few_atoms"
    ),
    "zero timestep": BadInput(
        md_body(timestep_fs=0), ["task.md.timestep_fs: Input should be greater than 0"]
    ),
    "negative timestep": BadInput(
        md_body(timestep_fs=-1.0), ["task.md.timestep_fs: Input should be greater than 0"]
    ),
    "more MD steps than the limit": BadInput(
        md_body(steps=101),
        ["task asks for 101 steps; this service accepts at most 100 (ATOMQ_MAX_STEPS)"],
        code="too_many_steps",
        setup=_small_step_limit,
    ),
    "npt on a cluster": BadInput(
        md_body(copper_cluster(), ensemble="npt", thermostat=None),
        ["an npt run changes the cell", "periodic in all three directions", "use nve/nvt"],
        code="npt_needs_pbc",
    ),
    "NEB endpoints differ in atom count": BadInput(
        neb_body(copper(), copper()[:3]),
        ["NEB endpoints differ in atom count: initial has 4, final has 3"],
        code="endpoints_differ",
    ),
    "NEB endpoints differ in element order": BadInput(
        neb_body(cu3ni(first="Ni"), cu3ni(first="Cu")),
        [
            "NEB endpoints differ in element order",
            "atom 0 is Ni in the initial and Cu in the final structure",
            "same atom order",
        ],
        code="endpoints_differ",
    ),
    "NEB endpoints differ in constraints": BadInput(
        neb_body(_pinned, copper()),
        ["NEB endpoints differ in constraints", "'indices': [0]", "final []"],
        code="endpoints_differ",
    ),
    "NEB endpoints differ in cell": BadInput(
        neb_body(copper(), _shrunk),
        ["NEB endpoints differ in cell or pbc; both must use the same cell"],
        code="endpoints_differ",
    ),
    "unknown ensemble": BadInput(
        md_body(ensemble="nph"), ["task.md.ensemble: Input should be 'nve', 'nvt' or 'npt'"]
    ),
    "nvt without a thermostat": BadInput(
        md_body(thermostat=None),
        ["task.md: ensemble nvt needs a thermostat: langevin, bussi or nose_hoover_chain"],
    ),
    "nve with a thermostat": BadInput(
        md_body(ensemble="nve", thermostat="bussi"),
        ["ensemble nve takes no thermostat; use nvt for a thermostat"],
    ),
    "no temperature for Maxwell-Boltzmann velocities": BadInput(
        md_body(ensemble="nve", thermostat=None, temperature_K=None),
        ["temperature_K is required", "initial Maxwell-Boltzmann velocities"],
    ),
    "velocities from a structure without momenta": BadInput(
        md_body(
            ensemble="nve",
            thermostat=None,
            temperature_K=None,
            initial_velocities="from_structure",
        ),
        ["initial_velocities is 'from_structure' but the structure carries no momenta"],
        code="no_velocities",
    ),
    "rdf pair with an absent element": BadInput(
        md_body(rdf_pairs=[["Cu", "Ni"]], rdf_rmax=3.0),
        ["rdf pair Cu-Ni: no Ni atoms in the structure"],
        code="rdf_element_absent",
    ),
    "rdf of a cluster": BadInput(
        md_body(copper_cluster(), rdf_pairs=[["Cu", "Cu"]], rdf_rmax=3.0),
        ["radial distribution functions are normalised by the cell volume"],
        code="rdf_needs_pbc",
    ),
    "rdf_rmax beyond half the cell": BadInput(
        # The 2x2x2 cubic cell is 2a = 7.23 Angstrom thick; half of it is 3.615.
        md_body(rdf_pairs=[["Cu", "Cu"]], rdf_rmax=6.0),
        ["rdf_rmax 6.0 Angstrom must be below half the cell's smallest thickness (3.615"],
        code="rdf_rmax_too_large",
    ),
    "analysis window out of order": BadInput(
        md_body(analysis_window=[0.8, 0.2]),
        ["analysis_window must be two fractions 0 <= start < end <= 1"],
    ),
    "NEB that also sends a structure": BadInput(
        {**neb_body(*vacancy_hop()), "structure": wire(copper())},
        ["an NEB job takes its structures from task.initial and task.final"],
    ),
    "MD without a structure": BadInput(
        _without_structure(md_body()), ["this md job needs a structure"]
    ),
    "NEB endpoint naming a job that does not exist": BadInput(
        neb_body({"job": 999}, vacancy_hop()[1]),
        ["NEB initial endpoint: no job 999"],
        code="unknown_endpoint_job",
    ),
    "NEB endpoint naming a queued job": BadInput(
        neb_body(copper(2), {"job": 1}),
        ["NEB final endpoint: job 1 is queued", "an endpoint must be a job that succeeded"],
        code="endpoint_job_unfinished",
        setup=_queued_job,
    ),
    "time limit above the service's": BadInput(
        {**md_body(), "time_limit_s": 3601},
        ["time_limit_s 3601 exceeds this service's limit of 3600 s (ATOMQ_MAX_WALL_TIME_S)"],
        code="time_limit_too_long",
        setup=_short_wall_time,
    ),
}


@pytest.mark.parametrize("case", list(BAD_INPUTS.values()), ids=list(BAD_INPUTS))
def test_bad_md_and_neb_input_is_refused_by_name_and_nothing_is_written(
    app: App, case: BadInput
) -> None:
    before = app.counts()
    submitted = case.setup(app) if case.setup is not None else 0

    response = post_job(app, case.body)

    assert response.status_code == 422, response.text
    answer = response.json()
    assert answer["code"] == case.code
    for fragment in case.fragments:
        assert fragment in answer["detail"]
    # Only what the setup itself submitted was written; the refused job left no row.
    assert app.counts() == {**before, "Job": before["Job"] + submitted}


ACCEPTED_NEIGHBOURS: dict[str, dict[str, Any]] = {
    "npt on a periodic cell": md_body(copper(2), ensemble="npt", thermostat=None),
    "velocities from a structure with momenta": md_body(
        copper_with_momenta(),
        ensemble="nve",
        thermostat=None,
        temperature_K=None,
        initial_velocities="from_structure",
    ),
    "rdf_rmax just below half the cell": md_body(rdf_pairs=[["Cu", "Cu"]], rdf_rmax=3.6),
    "nve without a thermostat": md_body(ensemble="nve", thermostat=None),
    "time limit equal to the service's": {**md_body(), "time_limit_s": 3600},
}


@pytest.mark.parametrize("body", list(ACCEPTED_NEIGHBOURS.values()), ids=list(ACCEPTED_NEIGHBOURS))
def test_the_valid_neighbours_of_refused_md_input_are_accepted(
    app: App, body: dict[str, Any]
) -> None:
    """The refusals above are narrow: one step back to valid input is accepted."""
    _short_wall_time(app)
    before = app.counts()
    job = submit(app, body)
    assert (job["kind"], job["state"]) == ("md", "queued")
    assert app.counts() == {**before, "Job": before["Job"] + 1}


# -- the seed the service draws ----------------------------------------------------------
def test_md_without_seed_gets_a_recorded_seed_that_the_input_hash_covers(app: App) -> None:
    body = md_body(copper(2))
    first, second = submit(app, body), submit(app, body)

    seeds = [first["task"]["seed"], second["task"]["seed"]]
    for seed in seeds:
        assert isinstance(seed, int) and 0 <= seed < 2**63
    # Two draws of 63 random bits coincide with probability 2^-63.
    assert seeds[0] != seeds[1]
    assert first["input_hash"] != second["input_hash"]

    wire_structure = Structure.model_validate(body["structure"])
    for job in (first, second):
        # The hash a client recomputes from the recorded task and seed is the service's.
        task = MD.model_validate(job["task"])
        assert job["input_hash"] == input_hash(wire_structure, task, "emt@1", task.seed)
        with Session(app.engine) as session:
            row = session.get(JobRow, job["id"])
            assert row is not None
            assert row.seed == job["task"]["seed"] == row.task["seed"]


def test_same_explicit_seed_same_input_hash(app: App) -> None:
    same = [submit(app, md_body(seed=2026)) for _ in range(2)]
    other = submit(app, md_body(seed=2027))
    assert [job["task"]["seed"] for job in same] == [2026, 2026]
    assert same[0]["input_hash"] == same[1]["input_hash"]
    assert other["input_hash"] != same[0]["input_hash"]


# -- NEB endpoints -----------------------------------------------------------------------
def test_neb_with_inline_endpoints_is_stored_inline(app: App) -> None:
    initial, final = vacancy_hop()
    before = app.counts()

    job = submit(app, neb_body(initial, final))

    assert job["kind"] == "neb"
    assert job["state"] == "queued"
    assert job["natoms"] == 31 == len(initial)
    assert job["formula"] == "Cu31"
    assert job["parents"] == []
    assert Structure.model_validate(job["task"]["initial"]) == Structure.from_atoms(initial)
    assert Structure.model_validate(job["task"]["final"]) == Structure.from_atoms(final)
    assert app.counts() == {**before, "Job": before["Job"] + 1}
    with Session(app.engine) as session:
        row = session.get(JobRow, job["id"])
        assert row is not None
        assert row.task["initial"] == wire(initial)
        assert row.task["final"] == wire(final)
        assert row.parents == []


def relax_with_ase(atoms: Atoms) -> RelaxResult:
    """A real relaxation with ASE's EMT and BFGS, in the shape a worker would store."""
    atoms = atoms.copy()
    atoms.calc = EMT()
    optimizer = BFGS(atoms, logfile=None)
    trace: list[RelaxStep] = []

    def record() -> None:
        forces = atoms.get_forces()
        trace.append(
            RelaxStep(
                step=optimizer.nsteps,
                energy=float(atoms.get_potential_energy()),
                fmax=float((forces**2).sum(axis=1).max() ** 0.5),
            )
        )

    optimizer.attach(record, interval=1)
    converged = bool(optimizer.run(fmax=0.05, steps=200))
    forces = atoms.get_forces()
    return RelaxResult(
        energy=float(atoms.get_potential_energy()),
        forces=[(float(f[0]), float(f[1]), float(f[2])) for f in forces],
        structure=Structure.from_atoms(atoms),
        converged=converged,
        steps=optimizer.nsteps,
        trace=trace,
    )


def test_neb_endpoint_from_a_finished_job_uses_its_result_structure(app: App) -> None:
    initial, final = vacancy_hop()
    relax_job = submit(
        app, {"structure": wire(initial), "task": {"kind": "relax"}, "calculator": "emt"}
    )
    relaxed = relax_with_ase(initial)
    assert relaxed.converged
    # Atoms around a vacancy relax, so the result differs from what was submitted; the
    # check below can therefore tell which of the two the service stored.
    assert relaxed.structure != Structure.from_atoms(initial)
    with Session(app.engine) as session:
        row = session.get(JobRow, relax_job["id"])
        assert row is not None
        row.state = "succeeded"
        session.add(row)
        session.add(
            JobResult(
                job_id=relax_job["id"],
                result=relaxed.model_dump(mode="json"),
                provenance={"note": "written by this test; no worker ran"},
            )
        )
        session.commit()
    before = app.counts()

    job = submit(app, neb_body({"job": relax_job["id"]}, final))

    assert job["kind"] == "neb"
    assert job["parents"] == [relax_job["id"]]
    assert Structure.model_validate(job["task"]["initial"]) == relaxed.structure
    assert Structure.model_validate(job["task"]["final"]) == Structure.from_atoms(final)
    assert app.counts() == {**before, "Job": before["Job"] + 1}
    with Session(app.engine) as session:
        stored = session.get(JobRow, job["id"])
        assert stored is not None
        # Stored as the structure itself, so the job reruns identically later.
        assert stored.task["initial"] == relaxed.structure.model_dump(mode="json")
        assert stored.parents == [relax_job["id"]]


# -- known defects -------------------------------------------------------------------------
def test_rdf_pair_of_an_element_with_a_single_atom_is_refused(app: App) -> None:
    # A 32-atom Cu cell with one Ni substituted: Ni-Ni has no pairs to count.
    atoms = copper(2)
    atoms[0].symbol = "Ni"
    before = app.counts()
    response = post_job(app, md_body(atoms, rdf_pairs=[["Ni", "Ni"]], rdf_rmax=3.0))
    assert response.status_code == 422, response.text
    assert "Ni" in response.json()["detail"]
    assert app.counts() == before
