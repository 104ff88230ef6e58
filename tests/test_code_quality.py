"""ruff and mypy are part of the test suite, so CI enforces them."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run(*command: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", *command], cwd=ROOT, capture_output=True, text=True, timeout=300
    )


def test_ruff_lint_and_format_are_clean() -> None:
    lint = run("ruff", "check", ".")
    assert lint.returncode == 0, lint.stdout + lint.stderr
    style = run("ruff", "format", "--check", ".")
    assert style.returncode == 0, style.stdout + style.stderr


def test_mypy_is_clean() -> None:
    check = run("mypy")
    assert check.returncode == 0, check.stdout + check.stderr
