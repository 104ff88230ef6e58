"""The canonical input hash: the same structure, task, calculator version and seed give
the same hash on every machine, so identical work can be recognised."""

from __future__ import annotations

import hashlib
import json

from atomq.structure import Structure
from atomq.tasks import Task


def input_hash(structure: Structure, task: Task, calculator_ref: str, seed: int | None) -> str:
    document = {
        "structure": structure.model_dump(mode="json"),
        "task": task.model_dump(mode="json"),
        "calculator": calculator_ref,
        "seed": seed,
    }
    # sort_keys + compact separators make the text canonical; float repr is exact.
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode()).hexdigest()
