"""Request bodies shared by the API tests."""

from __future__ import annotations

from typing import Any

# A Cu dimer 2.5 Angstrom apart: close to the fcc Cu nearest-neighbour distance,
# a / sqrt(2) = 2.556 Angstrom for a = 3.615 Angstrom (Kittel; recalled from memory).
CU_DIMER: dict[str, Any] = {"numbers": [29, 29], "positions": [[0.0, 0.0, 0.0], [2.5, 0.0, 0.0]]}
SINGLE_POINT: dict[str, Any] = {
    "structure": CU_DIMER,
    "task": {"kind": "single_point"},
    "calculator": "emt",
}
# A few MD steps, so that the job writes artifacts (a trajectory and a thermo log).
SHORT_MD: dict[str, Any] = {
    **SINGLE_POINT,
    "task": {
        "kind": "md",
        "ensemble": "nve",
        "temperature_K": 300.0,
        "timestep_fs": 1.0,
        "steps": 4,
        "frame_interval": 2,
        "thermo_interval": 2,
        "seed": 7,
    },
}
