"""Which atomq code this process runs: its version, and its git commit when there is one.

An installed release names itself in its metadata. An editable install's metadata was
fixed when it was installed and still names that commit after later ones, so when the
imported package lies in a git work tree of this project, git is asked what is checked
out now: the commit and whether tracked files differ from it. Worked out once per
process: a process runs the code it imported at its start.
"""

from __future__ import annotations

import subprocess
import tomllib
from dataclasses import dataclass
from functools import lru_cache
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

# The version setuptools-scm gives a copy without git metadata (pyproject.toml's
# fallback_version), used here too when atomq is imported without being installed.
UNINSTALLED_VERSION = "0.0.0"


@dataclass(frozen=True)
class CodeIdentity:
    """The code identity recorded in provenance."""

    # The metadata version, or in a work tree "<its public part>+g<commit>[.dirty]".
    version: str
    commit: str | None  # full sha of the checked-out commit; None outside a work tree
    dirty: bool | None  # tracked files changed since that commit; None outside a work tree


@lru_cache
def code_identity() -> CodeIdentity:
    """The identity of the imported atomq package, worked out once per process."""
    return identity_of(Path(__file__).resolve().parent)


def identity_of(package_dir: Path) -> CodeIdentity:
    """The identity of the atomq package in `package_dir`: from git when that directory
    is tracked in a work tree whose pyproject.toml names atomq, else the metadata's."""
    installed = installed_version()
    toplevel_and_head = _git(package_dir, "rev-parse", "--show-toplevel", "HEAD")
    if toplevel_and_head is None or len(toplevel_and_head.split()) != 2:
        return CodeIdentity(installed, None, None)
    toplevel, commit = toplevel_and_head.split()
    # A wheel installed into a virtual environment inside the work tree is not the
    # checked-out code: the package's own files must be tracked there.
    tracked = _git(package_dir, "ls-files", "--error-unmatch", "--", "__init__.py")
    if not names_atomq(Path(toplevel) / "pyproject.toml") or tracked is None:
        return CodeIdentity(installed, None, None)
    status = _git(Path(toplevel), "status", "--porcelain", "--untracked-files=no")
    if status is None:
        return CodeIdentity(installed, None, None)
    dirty = bool(status.strip())
    public = installed.split("+", 1)[0]  # PEP 440: what follows '+' is the local part
    local = f"g{commit[:9]}" + (".dirty" if dirty else "")
    return CodeIdentity(f"{public}+{local}", commit, dirty)


def installed_version() -> str:
    try:
        return version("atomq")
    except PackageNotFoundError:
        return UNINSTALLED_VERSION


def names_atomq(pyproject: Path) -> bool:
    """Whether this pyproject.toml is atomq's own (a work tree of this project)."""
    try:
        project = tomllib.loads(pyproject.read_text()).get("project", {})
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError):
        return False
    return isinstance(project, dict) and project.get("name") == "atomq"


def _git(directory: Path, *arguments: str) -> str | None:
    """git's output run in `directory`, or None where git is missing or refuses (not a
    work tree, a file not tracked, a repository owned by another user)."""
    try:
        done = subprocess.run(
            ["git", "-C", str(directory), *arguments],
            capture_output=True,
            text=True,
            timeout=10,
            check=False,
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return done.stdout if done.returncode == 0 else None
