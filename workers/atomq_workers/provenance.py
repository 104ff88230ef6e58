"""What this process is: package versions, host, CPU, threads. Captured once per process."""

from __future__ import annotations

import os
import platform
import socket
from functools import lru_cache
from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from atomq_workers.backends import Backend


def package_version(distribution: str) -> str:
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
    """Threads each numerical library will use in this process (BLAS, OpenMP)."""
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
    packages = {
        "python": platform.python_version(),
        "atomq": package_version("atomq"),
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
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "cpu": cpu_model(),
        "threads": thread_counts(),
    }
