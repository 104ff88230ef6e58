"""A model-swap report through the real stack (uvicorn, a Celery worker, Redis): the
Brackenfield group's Cu-Ni-Al jobs rerun under a second EMT version, every delta checked
against ASE run directly in this process with both versions (tests/model_swap.py), and
the CSV the command line writes read back to the same numbers."""

from __future__ import annotations

import csv
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from ase import Atoms

from atomq import NEB, JobState
from atomq.comparisons import METRICS, ComparisonPublic, ComparisonRow
from atomq_service.db import transaction
from atomq_service.demo import demo_structures
from atomq_service.registry import register
from tests.model_swap import (
    EMT_ASAP,
    assert_summary_matches_rows,
    emt,
    hop_endpoints,
    neb_band,
    relax_cell,
    single_point,
)
from tests.stack.conftest import Stack, start_stack

pytestmark = pytest.mark.stack

TAG = "brackenfield-upgrade"
# EMT is deterministic float64 and the workers reproduce ASE bit for bit (README, Units),
# so only the order of the arithmetic inside a delta may differ from the reference.
TIGHT = {"rel": 0, "abs": 1e-12}


@pytest.fixture
def swap_stack(tmp_path: Path, redis_url: str) -> Iterator[Stack]:
    """The stack with emt@2 registered before its worker starts: a worker chooses the
    queues it consumes when it starts."""
    stack = start_stack(tmp_path, f"sqlite:///{tmp_path / 'atomq.db'}", redis_url, workers=0)
    try:
        with transaction(stack.engine) as session:
            register(session, **EMT_ASAP)
        stack.start_worker()
        yield stack
    finally:
        stack.stop()


def baseline_work() -> dict[str, tuple[Atoms | None, Any]]:
    """From the demo study of the (made-up) Brackenfield alloy group: the rattled
    Cu50Ni25Al25 single point and the Ni lattice relaxation; plus a Ni adatom hop on
    Cu(001) as an NEB with inline endpoints."""
    demo = {label: (atoms, task) for label, atoms, task in demo_structures()}
    initial, final = hop_endpoints()
    hop = NEB(initial=initial, final=final, images=3, interpolation="linear", fmax=0.05)
    return {
        "single_point": demo["Cu50Ni25Al25 random alloy, single point"],
        "relax": demo["Ni fcc lattice"],
        "neb": (None, hop),
    }


def test_a_model_swap_report_equals_ase_with_both_versions(
    swap_stack: Stack, tmp_path: Path
) -> None:
    work = baseline_work()
    with swap_stack.client() as client:
        baselines = {
            kind: client.submit(atoms, task, calculator="emt@1", tags=[TAG])
            for kind, (atoms, task) in work.items()
        }
        for job in baselines.values():
            assert job.wait(timeout=300).state is JobState.succeeded, job.info().error
        comparison = client.compare("emt@2", tag=TAG)
        report = comparison.wait(timeout=300)
        frame = comparison.dataframe()

    assert report.complete, [(row.state, row.error) for row in report.rows]
    rows = {row.kind: row for row in report.rows}
    assert {row.baseline_job for row in report.rows} == {job.id for job in baselines.values()}
    check_rows_against_ase(work, rows)
    assert_summary_matches_rows(report)
    assert list(frame["baseline_job"]) == [row.baseline_job for row in report.rows]

    # The command line, computing every rerun again (--fresh), writes the same numbers.
    out = tmp_path / "swap.csv"
    cli = atomq(swap_stack, "compare", "--tag", TAG, "--calculator", "emt@2", "--fresh",
                "--baseline-calculator", "emt@1", "--wait", "--timeout", "300",
                "--csv", str(out))  # fmt: skip
    assert cli.returncode == 0, cli.stderr
    assert "(complete)" in cli.stdout and "validate" in cli.stdout
    check_csv_equals_report(out, report)
    shown = atomq(swap_stack, "compare", "--id", str(report.id))
    assert shown.returncode == 0, shown.stderr
    assert f"comparison {report.id}: 3 jobs by tag {TAG}, rerun with emt@2" in shown.stdout


def check_rows_against_ase(
    work: dict[str, tuple[Atoms | None, Any]], rows: dict[str, ComparisonRow]
) -> None:
    atoms, _ = work["single_point"]
    assert atoms is not None
    (e1, f1), (e2, f2) = single_point(atoms, emt("1")), single_point(atoms, emt("2"))
    row = rows["single_point"]
    assert row.delta_energy_per_atom_eV == pytest.approx((e2 - e1) / len(atoms), **TIGHT)
    assert row.max_force_delta_eV_per_A == pytest.approx(
        float(np.linalg.norm(f2 - f1, axis=1).max()), **TIGHT
    )
    assert row.delta_energy_per_atom_eV is not None and abs(row.delta_energy_per_atom_eV) > 1e-6

    atoms, task = work["relax"]
    assert atoms is not None
    before = relax_cell(atoms, emt("1"), fmax=task.fmax, steps=task.max_steps)
    after = relax_cell(atoms, emt("2"), fmax=task.fmax, steps=task.max_steps)
    row = rows["relax"]
    per_atom = (after.get_potential_energy() - before.get_potential_energy()) / len(atoms)
    assert row.delta_energy_per_atom_eV == pytest.approx(per_atom, **TIGHT)
    volume = 100 * (after.get_volume() / before.get_volume() - 1)
    assert row.volume_change_percent == pytest.approx(volume, **TIGHT)
    lengths = 100 * (after.cell.lengths() / before.cell.lengths() - 1)
    changes = [row.lattice_a_change_percent, row.lattice_b_change_percent,
               row.lattice_c_change_percent]  # fmt: skip
    assert changes == pytest.approx(list(lengths), **TIGHT)
    assert row.volume_change_percent is not None and abs(row.volume_change_percent) > 1e-6

    _, hop = work["neb"]
    initial, final = hop.initial.to_atoms(), hop.final.to_atoms()
    bands = [neb_band(initial, final, lambda v=v: emt(v), hop.images, hop.fmax) for v in "12"]
    row = rows["neb"]
    assert row.baseline_converged and row.candidate_converged
    barrier = [max(energies) - energies[0] for energies in bands]
    reaction = [energies[-1] - energies[0] for energies in bands]
    assert row.barrier_change_eV == pytest.approx(barrier[1] - barrier[0], **TIGHT)
    assert row.reaction_energy_change_eV == pytest.approx(reaction[1] - reaction[0], **TIGHT)
    initial_energy = (bands[1][0] - bands[0][0]) / len(initial)
    assert row.delta_energy_per_atom_eV == pytest.approx(initial_energy, **TIGHT)
    assert row.max_force_delta_eV_per_A is None  # the highest images are different structures


def atomq(stack: Stack, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**stack.env, "ATOMQ_URL": stack.url, "ATOMQ_TOKEN": stack.token}
    return subprocess.run(
        [sys.executable, "-m", "atomq.cli", *args],
        env=env,
        capture_output=True,
        text=True,
        timeout=400,
    )


def check_csv_equals_report(path: Path, report: ComparisonPublic) -> None:
    """A header row, then one row per baseline job whose numbers read back exactly."""
    with path.open(newline="") as handle:
        records = list(csv.DictReader(handle))
    assert list(records[0]) == list(ComparisonRow.model_fields)
    by_baseline = {int(r["baseline_job"]): r for r in records}
    assert set(by_baseline) == {row.baseline_job for row in report.rows}
    for row in report.rows:
        written = by_baseline[row.baseline_job]
        assert written["state"] == "succeeded"
        assert int(written["candidate_job"]) != row.candidate_job  # a new, fresh rerun
        for metric in METRICS:
            value = getattr(row, metric)
            assert (None if written[metric] == "" else float(written[metric])) == value, metric
