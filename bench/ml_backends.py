"""Load time, time per call and peak memory of the tight-binding and machine-learned backends.

Each model runs in a fresh child process (so memory and import costs are its own), with
one thread as in the workers (OMP_NUM_THREADS=1), unless --threads says otherwise.
Peak memory is the child's maximum resident set, Python and the imports included.
Workload: Cu fcc, 32 atoms (2x2x2 cubic) and 64 atoms (4x4x1 cubic). The first call sees
the perfect lattice and is reported apart (torch builds its kernels then); every later call
rattles the atoms, so nothing is served from the calculator's cache. Any attempt to open a
network socket during load or calls is listed (a Python audit hook). Needs the ml packages.

    python bench/ml_backends.py [--threads 1] [--calls 5]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from typing import Any

MODELS: dict[str, tuple[str, dict[str, Any]]] = {
    "tblite GFN2-xTB": ("tblite", {"method": "GFN2-xTB"}),
    "sevennet 7net-0": ("sevennet", {"checkpoint": "7net-0"}),
    "sevennet 7net-l3i5": ("sevennet", {"checkpoint": "7net-l3i5"}),
    "sevennet 7net-mf-0 PBE": ("sevennet", {"checkpoint": "7net-mf-0", "modal": "PBE"}),
    "sevennet 7net-0 + D3(BJ)": (
        "sevennet",
        {"checkpoint": "7net-0", "d3": {"method": "PBE", "damping": "d3bj"}},
    ),
    "chgnet 0.2.0": ("chgnet", {"model": "0.2.0"}),
    "chgnet 0.3.0": ("chgnet", {"model": "0.3.0"}),
    "chgnet r2scan": ("chgnet", {"model": "r2scan"}),
}

CHILD = r"""
import json, resource, statistics, sys, time
network = []
def watch(event, args):
    if event in ("socket.connect", "socket.bind", "socket.getaddrinfo", "urllib.Request"):
        shown = [a for a in args if not hasattr(a, "fileno")][:2]  # not the socket itself
        network.append(f"{event} {shown!r}"[:100])
sys.addaudithook(watch)

def peak_mib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

backend_name, parameters, calls = json.loads(sys.argv[1])
from ase.build import bulk
from atomq_workers.backends_ml import BACKENDS
baseline = peak_mib()
start = time.perf_counter()
calculator = BACKENDS[backend_name].make(parameters, None)
result = {"load_s": time.perf_counter() - start}  # imports included, as in a fresh worker
start = time.perf_counter()
BACKENDS[backend_name].make(parameters, None)
result["reload_s"] = time.perf_counter() - start  # the model alone
for label, repeat in (("32", (2, 2, 2)), ("64", (4, 4, 1))):
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat(repeat)
    atoms.calc = calculator
    times = []
    try:
        for call in range(calls + 1):
            if call:  # the first call sees the perfect lattice
                atoms.rattle(0.02, seed=call)
            start = time.perf_counter()
            atoms.get_potential_energy(), atoms.get_forces()
            times.append(time.perf_counter() - start)
    except Exception as exc:
        result[f"error_{label}"] = f"{type(exc).__name__}: {exc}"[:120]
    result[f"first_call_{label}_s"] = times[0] if times else float("nan")
    later = times[1:] or [float("nan")]
    result[f"call_{label}_s"] = statistics.median(later)
    result[f"best_{label}_s"] = min(later)
result["peak_mib"] = peak_mib()
result["baseline_mib"] = baseline
result["network"] = sorted(set(network))
print("RESULT " + json.dumps(result))
"""


def run(backend: str, parameters: dict[str, Any], calls: int, threads: int) -> dict[str, Any]:
    env = {**os.environ, "OMP_NUM_THREADS": str(threads), "MKL_NUM_THREADS": str(threads)}
    child = subprocess.run(
        [sys.executable, "-c", CHILD, json.dumps([backend, parameters, calls])],
        capture_output=True,
        text=True,
        env=env,
        timeout=1800,
    )
    for line in child.stdout.splitlines():
        if line.startswith("RESULT "):
            return dict(json.loads(line[7:]))
    return {"error": (child.stderr or child.stdout).strip().splitlines()[-1:]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--calls", type=int, default=5)
    args = parser.parse_args()
    print(f"threads {args.threads}, median of {args.calls} calls after the first")
    print(f"load average at start {os.getloadavg()[0]:.2f} (other work on the machine skews times)")
    header = "model", "load s", "reload", "1st 32", "32 med/min s", "1st 64", "64 med/min s"
    print("{:<26} {:>7} {:>7} {:>7} {:>13} {:>7} {:>13} peak MiB  network".format(*header))
    for name, (backend, parameters) in MODELS.items():
        r = run(backend, parameters, args.calls, args.threads)
        if "error" in r:
            print(f"{name:<26} failed: {r['error']}")
            continue
        print(
            f"{name:<26} {r['load_s']:7.2f} {r['reload_s']:7.2f} "
            f"{r['first_call_32_s']:7.2f} {r['call_32_s']:6.3f}/{r['best_32_s']:6.3f} "
            f"{r['first_call_64_s']:7.2f} {r['call_64_s']:6.3f}/{r['best_64_s']:6.3f} "
            f"{r['peak_mib']:8.0f}  "
            f"{'; '.join(r['network']) or 'none'}"
        )
        for label in ("32", "64"):
            if f"error_{label}" in r:
                print(f"{'':<26} {label} atoms, rattled: {r[f'error_{label}']}")
    print(f"load average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
