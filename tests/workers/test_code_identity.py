"""atomq's code identity (atomq.version) against git itself, the outside reference: in
this development checkout, in scratch work trees, and where there is no work tree."""

from __future__ import annotations

import shutil
import subprocess
from importlib.metadata import version
from pathlib import Path

import pytest

import atomq
from atomq.version import code_identity, identity_of

pytestmark = pytest.mark.skipif(shutil.which("git") is None, reason="needs git")

CHECKOUT = Path(atomq.__file__).resolve().parents[2]  # client/atomq/__init__.py
METADATA = version("atomq")


def git(directory: Path, *arguments: str) -> str:
    return subprocess.run(
        ["git", "-C", str(directory), *arguments], capture_output=True, text=True, check=True
    ).stdout


def work_tree(path: Path, project: str) -> Path:
    """A git work tree whose pyproject.toml names `project`, with a package atomq/
    committed and a folder venv/ the work tree ignores."""
    (path / "atomq").mkdir(parents=True)
    (path / "pyproject.toml").write_text(f'[project]\nname = "{project}"\n')
    (path / "atomq" / "__init__.py").write_text('"""A copy of the package."""\n')
    (path / ".gitignore").write_text("venv/\n")
    git(path, "init", "-q")
    git(path, "add", ".")
    identity = ["-c", "user.name=Lab Bench", "-c", "user.email=bench@lab.invalid"]
    git(path, *identity, "commit", "-q", "-m", "scratch")
    return path


def test_this_checkout_names_the_commit_and_dirty_flag_git_gives() -> None:
    if git(CHECKOUT, "rev-parse", "--is-inside-work-tree").strip() != "true":
        pytest.skip("atomq is not imported from a git checkout here")
    identity = code_identity()
    head = git(CHECKOUT, "rev-parse", "HEAD").strip()
    dirty = bool(git(CHECKOUT, "status", "--porcelain", "--untracked-files=no").strip())
    assert identity.commit == head
    assert identity.dirty is dirty
    suffix = f"+g{head[:9]}" + (".dirty" if dirty else "")
    assert identity.version == METADATA.split("+")[0] + suffix
    assert atomq.__version__ == identity.version


def test_a_scratch_work_tree_of_atomq_names_its_head_and_then_its_changes(
    tmp_path: Path,
) -> None:
    tree = work_tree(tmp_path / "tree", "atomq")
    head = git(tree, "rev-parse", "HEAD").strip()
    clean = identity_of(tree / "atomq")
    assert (clean.commit, clean.dirty) == (head, False)
    assert clean.version == f"{METADATA.split('+')[0]}+g{head[:9]}"

    (tree / "atomq" / "__init__.py").write_text('"""Edited, not committed."""\n')
    edited = identity_of(tree / "atomq")
    assert (edited.commit, edited.dirty) == (head, True)
    assert edited.version.endswith(f"+g{head[:9]}.dirty")


def test_an_untracked_file_does_not_make_the_tree_dirty(tmp_path: Path) -> None:
    tree = work_tree(tmp_path / "tree", "atomq")
    (tree / "notes.txt").write_text("scratch notes\n")
    assert identity_of(tree / "atomq").dirty is False


@pytest.mark.parametrize(
    "where",
    ["not a work tree", "another project's work tree", "an ignored folder of atomq's tree"],
)
def test_elsewhere_the_installed_metadata_version_is_used(tmp_path: Path, where: str) -> None:
    if where == "not a work tree":
        package = tmp_path / "site-packages" / "atomq"
        package.mkdir(parents=True)
        (package / "__init__.py").write_text("")
    elif where == "another project's work tree":
        package = work_tree(tmp_path / "tree", "another-project") / "atomq"
    else:  # a wheel installed into a virtual environment inside the work tree
        package = work_tree(tmp_path / "tree", "atomq") / "venv" / "site-packages" / "atomq"
        package.mkdir(parents=True)
        (package / "__init__.py").write_text("")
    identity = identity_of(package)
    assert (identity.version, identity.commit, identity.dirty) == (METADATA, None, None)
