"""What this process is: package versions, host, CPU, threads. Captured once per process."""

from __future__ import annotations

import os
import platform
import socket
import sys
from functools import lru_cache
from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any

from atomq.version import code_identity

if TYPE_CHECKING:
    from atomq_workers.backends import Backend


@lru_cache
def package_version(distribution: str) -> str:
    # Cached per process: the code a worker runs is what it imported at start, even if a
    # package is upgraded on disk meanwhile (and reading the metadata took ~2 ms a job).
    try:
        return version(distribution)
    except PackageNotFoundError:
        return "not installed"


@lru_cache
def cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as handle:
            for line in handle:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def thread_counts() -> dict[str, int]:
    """Threads each numerical library will use in this process (BLAS, OpenMP, torch)."""
    counts = dict(_native_thread_counts())
    torch = sys.modules.get("torch")  # only where a backend imported it
    if torch is not None:
        counts["torch:intra_op"] = int(torch.get_num_threads())
    return counts


@lru_cache
def _native_thread_counts() -> dict[str, int]:
    # Fixed for the life of a worker process (set before it starts); threadpoolctl's scan
    # of the loaded libraries costs milliseconds, so it runs once.
    counts: dict[str, int] = {}
    try:
        from threadpoolctl import threadpool_info

        for pool in threadpool_info():
            counts[f"{pool['user_api']}:{pool['internal_api']}"] = int(pool["num_threads"])
    except Exception:  # threadpoolctl is optional; fall back to what the environment asks
        pass
    for variable in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        if variable in os.environ and os.environ[variable].isdigit():
            counts[variable] = int(os.environ[variable])
    return counts


def environment(backend: Backend | None, parameters: dict[str, Any]) -> dict[str, object]:
    atomq = code_identity()  # worked out once per process (the worker does so at start)
    packages = {
        "python": platform.python_version(),
        "atomq": atomq.version,
        "ase": package_version("ase"),
        "numpy": package_version("numpy"),
    }
    if backend is not None:
        extra = [backend.package, *backend.runtime_packages]
        if "d3" in parameters:  # dispersion added on top of the model
            extra.append("dftd3")
        for name in extra:
            packages.setdefault(name, package_version(name))
    return {
        "packages": packages,
        "atomq_commit": atomq.commit,
        "atomq_dirty": atomq.dirty,
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "cpu": cpu_model(),
        "threads": thread_counts(),
    }
