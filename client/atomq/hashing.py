"""The canonical input hash: the same structure, task, calculator version and seed give
the same hash on every machine, so identical work can be recognised."""

from __future__ import annotations

import hashlib
import json
from typing import Any

from atomq.structure import Structure
from atomq.tasks import Task


def input_hash(structure: Structure, task: Task, calculator_ref: str, seed: int | None) -> str:
    return hash_of_dumped(
        structure.model_dump(mode="json"), task.model_dump(mode="json"), calculator_ref, seed
    )


def hash_of_dumped(
    structure: dict[str, Any], task: dict[str, Any], calculator_ref: str, seed: int | None
) -> str:
    """input_hash from the structure's and task's JSON forms (model_dump(mode="json")),
    for callers that need those forms anyway."""
    document = {"structure": structure, "task": task, "calculator": calculator_ref, "seed": seed}
    # sort_keys + compact separators make the text canonical; float repr is exact.
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode()).hexdigest()
