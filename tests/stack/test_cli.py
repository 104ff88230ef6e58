"""The `atomq` command line against the real stack."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import ase.io
import httpx
import pytest
from ase.build import bulk

from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack


def atomq(
    stack: Stack, *args: str, env: dict[str, str] | None = None
) -> subprocess.CompletedProcess[str]:
    env = {**stack.env, "ATOMQ_URL": stack.url, "ATOMQ_TOKEN": stack.token, **(env or {})}
    return subprocess.run(
        [sys.executable, "-m", "atomq.cli", *args],
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_submit_list_show_fetch_cancel(redis_stack: Stack, tmp_path: Path) -> None:
    listing = atomq(redis_stack, "calculators")
    assert listing.returncode == 0, listing.stderr
    assert "emt@1" in listing.stdout and "lj-argon@1" in listing.stdout

    cells = tmp_path / "cells.extxyz"
    ase.io.write(
        cells, [bulk("Cu", "fcc", a=3.7, cubic=True), bulk("Ni", "fcc", a=3.6, cubic=True)]
    )
    submitted = atomq(
        redis_stack, "submit", str(cells), "--task", "relax", "--relax-cell",
        "--fmax", "0.01", "--calculator", "emt", "--tag", "cli-study", "--wait",
    )  # fmt: skip
    assert submitted.returncode == 0, submitted.stderr
    ids = [line for line in submitted.stdout.splitlines() if line.isdigit()]
    assert len(ids) == 2
    assert submitted.stdout.count("succeeded") == 2
    assert "step" in submitted.stderr  # the progress bar
    assert f"job {ids[0]}: 'emt' pinned to emt@1, its default version" in submitted.stderr

    jobs = atomq(redis_stack, "jobs", "--tag", "cli-study")
    assert jobs.returncode == 0, jobs.stderr
    assert "(2 of 2)" in jobs.stdout and "Cu4" in jobs.stdout and "Ni4" in jobs.stdout

    shown = atomq(redis_stack, "show", ids[0])
    assert shown.returncode == 0, shown.stderr
    document = json.loads(shown.stdout)
    assert document["provenance"]["calculator"] == "emt@1"
    assert document["result"]["converged"] is True

    out = tmp_path / "relaxed.extxyz"
    fetched = atomq(redis_stack, "fetch", ids[0], "-o", str(out))
    assert fetched.returncode == 0, fetched.stderr
    relaxed = ase.io.read(out)
    assert relaxed.get_potential_energy() == document["result"]["energy"]

    refused = atomq(redis_stack, "cancel", ids[0])
    assert refused.returncode == 1
    assert "already ended succeeded" in refused.stderr


def test_users_add_prints_a_working_token(redis_stack: Stack) -> None:
    added = subprocess.run(
        [sys.executable, "-m", "atomq.cli", "users", "add", "hana"],
        env=redis_stack.env,  # the same ATOMQ_DATABASE_URL as the running API
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert added.returncode == 0, added.stderr
    token = added.stdout.strip()
    assert token.startswith("atq_")
    answer = httpx.get(f"{redis_stack.url}/v1/jobs", headers={"Authorization": f"Bearer {token}"})
    assert answer.status_code == 200
    wrong = httpx.get(f"{redis_stack.url}/v1/jobs", headers={"Authorization": "Bearer atq_x"})
    assert wrong.status_code == 401


def test_md_and_neb_from_the_command_line(redis_stack: Stack, tmp_path: Path) -> None:
    cell = tmp_path / "cu.extxyz"
    ase.io.write(cell, bulk("Cu", "fcc", a=3.61, cubic=True).repeat(2))
    md = atomq(
        redis_stack, "submit", str(cell), "--task", "md", "--ensemble", "nvt",
        "--thermostat", "bussi", "--temperature", "300", "--steps", "50",
        "--frame-interval", "10", "--calculator", "emt", "--wait",
    )  # fmt: skip
    assert md.returncode == 0, md.stderr
    job_id = md.stdout.split()[0]
    assert "succeeded" in md.stdout and "T=" in md.stderr  # temperature in the progress bar
    out = tmp_path / "trajectory.extxyz"
    fetched = atomq(redis_stack, "fetch", job_id, "--artifact", "trajectory.extxyz", "-o", str(out))
    assert fetched.returncode == 0, fetched.stderr
    assert len(ase.io.read(out, index=":")) == 6  # steps 0, 10, ..., 50

    # An NEB between a cell and a copy with one atom nudged, both ends given as files.
    start = bulk("Cu", "fcc", a=3.61, cubic=True).repeat(2)
    end = start.copy()
    end.positions[0] += (0.1, 0.0, 0.0)
    ase.io.write(tmp_path / "a.extxyz", start)
    ase.io.write(tmp_path / "b.extxyz", end)
    neb = atomq(
        redis_stack, "submit-neb", str(tmp_path / "a.extxyz"), str(tmp_path / "b.extxyz"),
        "--images", "2", "--interpolation", "linear", "--calculator", "emt", "--wait",
    )  # fmt: skip
    assert neb.returncode == 0, neb.stderr
    assert "succeeded" in neb.stdout

    wrong = atomq(redis_stack, "submit", str(cell), "--task", "md", "--calculator", "emt")
    assert wrong.returncode != 0
    assert "nvt needs a thermostat" in wrong.stderr
