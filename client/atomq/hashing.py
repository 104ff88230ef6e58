"""The canonical input hash: the same structure, task, calculator version and seed give
the same hash on every machine, so identical work can be recognised.

Version 2 (HASH_VERSION) hashes a canonical form in which every field holding its default
value is left out, at every depth (tags that say which kind of thing a mapping is, `kind`,
`type` and `dtype`, always stay). So a new field with a default that means "as before"
moves no hash, and the hashes of a lab's earlier jobs keep matching after an upgrade. The
rule that keeps this true: a field's default value never changes (changing one needs a new
hash version). What counts: everything in the structure (atoms.info included: ASE
calculators and ML models may read it, so the service does not guess what is a comment),
the task, the calculator name@version and the seed.

Version 1 (atomq up to commit 780447e) hashed the full dump with every default. Those jobs
keep their hashes as recorded (they are in their provenance); `v1_hash` reproduces the
version-1 hash of a request from today's models, so they are still found by reuse.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from pydantic import BaseModel

from atomq.structure import Structure
from atomq.tasks import Task

HASH_VERSION = 2
TAGS = frozenset({"kind", "type", "dtype"})  # kept even at their default

# The fields each model had at commit 780447e, when version 1 was the only version.
V1_FIELDS: dict[str, frozenset[str]] = {
    name: frozenset(fields.split())
    for name, fields in {
        "FixAtomsConstraint": "indices type",
        "FixCartesianConstraint": "indices mask type",
        "Structure": "cell constraints info initial_charges initial_magmoms momenta numbers "
        "pbc positions tags",
        "CellRelax": "constant_volume hydrostatic_strain scalar_pressure",
        "JobReference": "job",
        "MD": "analysis_window barostat_time_fs cell_flexibility ensemble frame_interval "
        "friction_per_fs initial_velocities kind pressure_GPa rdf_nbins rdf_pairs rdf_rmax "
        "seed steps temperature_K thermo_interval thermostat thermostat_time_fs timestep_fs",
        "NEB": "climb final fmax images initial interpolation kind max_steps method optimizer "
        "spring_constant",
        "Relax": "cell fmax kind max_steps optimizer",
        "SinglePoint": "kind",
    }.items()
}


class _NoV1Form(Exception):
    """The request uses something version 1 could not express: no v1 job can match it."""


def _form(model: BaseModel, dumped: dict[str, Any], v1: bool) -> dict[str, Any]:
    """The canonical form of `model`, built from its JSON dump (model_dump(mode="json"),
    which callers have anyway) so large lists are never walked again.

    v1=False: fields at their default left out. v1=True: version 1's full dump, where
    fields that did not exist then must hold their default and are left out."""
    known = _v1_fields(type(model)) if v1 else None
    form: dict[str, Any] = {}
    for name, field in type(model).model_fields.items():
        value = getattr(model, name)
        at_default = not field.is_required() and value == field.get_default(
            call_default_factory=True
        )
        if known is not None and name not in known:
            if not at_default:
                raise _NoV1Form(name)
            continue
        if not v1 and at_default and name not in TAGS:
            continue
        form[name] = _nested(value, dumped[name], v1)
    return form


def _v1_fields(model: type[BaseModel]) -> frozenset[str]:
    """The fields version 1 knew of this model (or of the model it extends)."""
    for cls in model.__mro__:
        if cls.__name__ in V1_FIELDS:
            return V1_FIELDS[cls.__name__]
    raise _NoV1Form(model.__name__)  # a kind of thing added since (a new constraint)


def _nested(value: Any, dumped: Any, v1: bool) -> Any:
    if isinstance(value, BaseModel):
        return _form(value, dumped, v1)
    if isinstance(value, list | tuple) and value and isinstance(value[0], BaseModel):
        return [_nested(item, d, v1) for item, d in zip(value, dumped, strict=True)]
    if isinstance(value, dict) and any(isinstance(item, BaseModel) for item in value.values()):
        return {key: _nested(item, dumped[key], v1) for key, item in value.items()}
    return dumped


def _digest(document: dict[str, Any]) -> str:
    # sort_keys + compact separators make the text canonical; float repr is exact.
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode()).hexdigest()


def input_hash(structure: Structure, task: Task, calculator_ref: str, seed: int | None) -> str:
    """The version-2 hash of a request."""
    return hash_of(
        structure, structure.model_dump(mode="json"), task, task.model_dump(mode="json"),
        calculator_ref, seed,
    )  # fmt: skip


def hash_of(
    structure: Structure,
    structure_json: dict[str, Any],
    task: Task,
    task_json: dict[str, Any],
    calculator_ref: str,
    seed: int | None,
) -> str:
    """input_hash from the models and their JSON forms (model_dump(mode="json")), for
    callers that need those forms anyway (the service stores them)."""
    return _digest(
        {
            "hash_version": HASH_VERSION,
            "structure": _form(structure, structure_json, v1=False),
            "task": _form(task, task_json, v1=False),
            "calculator": calculator_ref,
            "seed": seed,
        }
    )


def v1_hash(
    structure: Structure,
    structure_json: dict[str, Any],
    task: Task,
    task_json: dict[str, Any],
    calculator_ref: str,
    seed: int | None,
) -> str | None:
    """The hash atomq's version 1 gave this request, or None where version 1 could not
    have expressed it (a field or constraint added since, holding a value of its own)."""
    try:
        structure_form = _form(structure, structure_json, v1=True)
        task_form = _form(task, task_json, v1=True)
    except _NoV1Form:
        return None
    return _digest(
        {"structure": structure_form, "task": task_form, "calculator": calculator_ref,
         "seed": seed}
    )  # fmt: skip
