"""A real worker process names the atomq commit it runs in every provenance record;
git, run here on the same checkout, is the reference."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from ase.build import bulk

import atomq
from atomq import SinglePoint
from tests.stack.conftest import Stack

pytestmark = [
    pytest.mark.stack,
    pytest.mark.skipif(shutil.which("git") is None, reason="needs git"),
]

CHECKOUT = Path(atomq.__file__).resolve().parents[2]


def git(*arguments: str) -> str:
    return subprocess.run(
        ["git", "-C", str(CHECKOUT), *arguments], capture_output=True, text=True, check=True
    ).stdout.strip()


def test_provenance_names_the_checked_out_commit_and_dirty_flag(redis_stack: Stack) -> None:
    if git("rev-parse", "--is-inside-work-tree") != "true":
        pytest.skip("atomq is not imported from a git checkout here")
    # Read as close as possible to the worker's own start (a commit made in between by
    # someone else would rightly differ from what the worker runs).
    head = git("rev-parse", "HEAD")
    dirty = bool(git("status", "--porcelain", "--untracked-files=no"))
    job = redis_stack.client().submit(bulk("Cu", "fcc", a=3.6), SinglePoint(), calculator="emt")
    assert job.wait(60).state == "succeeded"

    provenance = job.provenance()
    assert provenance.atomq_commit == head
    assert provenance.atomq_dirty is dirty
    assert provenance.packages["atomq"].endswith(f"+g{head[:9]}" + (".dirty" if dirty else ""))
    agents = job.prov_json()["agent"].values()
    (worker,) = [agent for agent in agents if agent["prov:type"] == "prov:SoftwareAgent"]
    assert worker["atomq:commit"] == head and worker["atomq:dirty"] is dirty
