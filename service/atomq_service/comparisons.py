"""Model-swap reports: rerun finished jobs under another calculator version, then compare.

Creating a comparison writes one candidate job per baseline job, all in the caller's
transaction: either every candidate is recorded or, when any is refused, none. The report
is computed on every read from the stored results, so it fills in as the candidates finish.
What each metric means is documented once, in `atomq.comparisons`.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Any

import numpy as np
from pydantic import TypeAdapter
from sqlmodel import Session, col, select

from atomq.comparisons import (
    MAX_COMPARISON_JOBS,
    METRICS,
    ComparisonCreate,
    ComparisonPublic,
    ComparisonRow,
    summarize,
)
from atomq.jobs import JobCreate, JobState
from atomq.structure import Structure
from atomq.tasks import NEB, TaskSpec
from atomq_service import jobs, registry
from atomq_service.errors import ApiError
from atomq_service.models import Comparison, ComparisonItem, Job, JobResult, JobTag, User
from atomq_service.settings import Settings

_task_adapter: TypeAdapter[Any] = TypeAdapter(TaskSpec)
# Refusals list this many job ids at most; the rest are counted.
LISTED = 20


def request_fingerprint(request: ComparisonCreate) -> str:
    return hashlib.sha256(request.model_dump_json().encode()).hexdigest()


def find_by_idempotency_key(
    session: Session, owner: User, key: str, request: ComparisonCreate
) -> Comparison | None:
    """The comparison an earlier try of this same request created, if any."""
    earlier = session.exec(
        select(Comparison).where(Comparison.owner_id == owner.id, Comparison.idempotency_key == key)
    ).first()
    if earlier is not None and earlier.request_sha256 != request_fingerprint(request):
        raise ApiError(
            422,
            "idempotency_key_reused",
            f"Idempotency-Key {key!r} was already used for a different comparison "
            f"({earlier.id}); use a new key for a new comparison",
        )
    return earlier


def create_comparison(
    session: Session,
    owner: User,
    request: ComparisonCreate,
    settings: Settings,
    idempotency_key: str | None = None,
) -> tuple[Comparison, list[Job]]:
    """Record the comparison and its candidate jobs (queued, or already succeeded when the
    service reused an identical result). Raises ApiError before anything is committed;
    the caller commits, then dispatches the queued jobs."""
    calculator = registry.resolve(session, request.calculator)
    baselines = select_baselines(session, request)
    already = [job for job in baselines if job.calculator_ref == calculator.ref]
    if already:
        raise ApiError(
            422,
            "same_calculator",
            f"{_ids(already)} already ran with {calculator.ref}; compare against another "
            "version, or narrow the selection with baseline_calculator",
        )
    assert owner.id is not None and calculator.id is not None
    comparison = Comparison(
        owner_id=owner.id,
        calculator_id=calculator.id,
        calculator_ref=calculator.ref,
        selection=describe_selection(request, len(baselines)),
        idempotency_key=idempotency_key,
        request_sha256=request_fingerprint(request),
    )
    session.add(comparison)
    session.flush()
    assert comparison.id is not None
    tags = [comparison_tag(comparison.id), *request.tags]
    created: list[Job] = []
    for baseline in baselines:
        try:
            job = jobs.create_job(
                session, owner, rerun_request(baseline, calculator.ref, tags, request), settings
            )
        except ApiError as exc:
            raise ApiError(
                exc.status_code,
                exc.code,
                f"job {baseline.id} ({baseline.kind} of {baseline.formula}) cannot be rerun "
                f"with {calculator.ref}: {exc.message}. Nothing was created",
            ) from exc
        assert job.id is not None and baseline.id is not None
        # The rerun derives from the baseline: lineage and provenance name it.
        if baseline.id not in job.parents:
            job.parents = [*job.parents, baseline.id]
            session.add(job)
        session.add(
            ComparisonItem(
                comparison_id=comparison.id, baseline_job_id=baseline.id, candidate_job_id=job.id
            )
        )
        created.append(job)
    session.flush()
    return comparison, created


def comparison_tag(comparison_id: int) -> str:
    return f"comparison-{comparison_id}"


def describe_selection(request: ComparisonCreate, count: int) -> str:
    chosen = f"tag {request.tag}" if request.tag is not None else "job ids"
    only = f", run with {request.baseline_calculator}" if request.baseline_calculator else ""
    return f"{count} jobs by {chosen}{only}"


def select_baselines(session: Session, request: ComparisonCreate) -> list[Job]:
    """The jobs the request names, each of which must have succeeded."""
    query = select(Job)
    if request.tag is not None:
        query = query.join(JobTag, col(JobTag.job_id) == col(Job.id)).where(
            JobTag.tag == request.tag
        )
        what = f"tag {request.tag!r}"
    else:
        assert request.job_ids is not None  # the contract requires tag or job_ids
        wanted = sorted(set(request.job_ids))
        existing = set(session.exec(select(Job.id).where(col(Job.id).in_(wanted))).all())
        missing = [job_id for job_id in wanted if job_id not in existing]
        if missing:
            raise ApiError(
                422,
                "unknown_jobs",
                f"no jobs with ids {', '.join(map(str, missing[:LISTED]))}{_more(missing)}; "
                "list only existing jobs",
            )
        query = query.where(col(Job.id).in_(wanted))
        what = "the given job ids"
    if request.baseline_calculator is not None:
        name = request.baseline_calculator
        if "@" in name:
            query = query.where(Job.calculator_ref == name)
        else:
            query = query.where(col(Job.calculator_ref).startswith(name + "@", autoescape=True))
        what += f" run with {name}"
    found = list(session.exec(query.order_by(col(Job.id)).limit(MAX_COMPARISON_JOBS + 1)).all())
    if not found:
        raise ApiError(
            422,
            "empty_selection",
            f"no job matches {what}; nothing to compare (check the tag with `atomq jobs "
            "--tag` or the calculator with `atomq calculators`)",
        )
    if len(found) > MAX_COMPARISON_JOBS:
        raise ApiError(
            422,
            "selection_too_large",
            f"more than {MAX_COMPARISON_JOBS} jobs match {what}; a comparison reruns at "
            "most that many: narrow it with baseline_calculator, or split it by job_ids",
        )
    unfinished = [job for job in found if job.state != JobState.succeeded.value]
    if unfinished:
        states = ", ".join(f"job {job.id} is {job.state}" for job in unfinished[:LISTED])
        raise ApiError(
            422,
            "baseline_not_succeeded",
            f"only jobs that succeeded can be compared: {states}{_more(unfinished)}. "
            "Wait for running and queued jobs, or leave these out by listing job_ids",
        )
    return found


def rerun_request(
    baseline: Job, calculator: str, tags: list[str], request: ComparisonCreate
) -> JobCreate:
    """The baseline's own structure and task (an MD seed included, and NEB endpoints,
    which the service stores inline) under another calculator."""
    task = _task_adapter.validate_python(baseline.task)
    structure = None if isinstance(task, NEB) else Structure.model_validate(baseline.structure)
    return JobCreate(
        structure=structure,
        task=task,
        calculator=calculator,
        tags=tags,
        time_limit_s=request.time_limit_s,
        reuse=request.reuse,
    )


def get_comparison(session: Session, comparison_id: int) -> Comparison:
    comparison = session.get(Comparison, comparison_id)
    if comparison is None:
        raise ApiError(404, "comparison_not_found", f"no comparison with id {comparison_id}")
    return comparison


def report(session: Session, comparison: Comparison) -> ComparisonPublic:
    """The comparison's rows and summary from the results stored so far (three queries)."""
    items = session.exec(
        select(ComparisonItem)
        .where(ComparisonItem.comparison_id == comparison.id)
        .order_by(col(ComparisonItem.baseline_job_id))
    ).all()
    ids = [i.baseline_job_id for i in items] + [i.candidate_job_id for i in items]
    rows_by_id = {job.id: job for job in session.exec(select(Job).where(col(Job.id).in_(ids)))}
    results: dict[int, dict[str, Any]] = {
        stored.job_id: stored.result
        for stored in session.exec(select(JobResult).where(col(JobResult.job_id).in_(ids)))
    }
    owner = session.get(User, comparison.owner_id)
    assert owner is not None and comparison.id is not None
    rows = [
        compare_pair(
            rows_by_id[item.baseline_job_id],
            rows_by_id[item.candidate_job_id],
            results.get(item.baseline_job_id),
            results.get(item.candidate_job_id),
        )
        for item in items
    ]
    return ComparisonPublic(
        id=comparison.id,
        owner=owner.name,
        calculator=comparison.calculator_ref,
        selection=comparison.selection,
        tag=comparison_tag(comparison.id),
        created_at=comparison.created_at,
        complete=all(row.state.finished for row in rows),
        rows=rows,
        summary={metric: summarize(getattr(row, metric) for row in rows) for metric in METRICS},
    )


def compare_pair(
    baseline: Job,
    candidate: Job,
    baseline_result: dict[str, Any] | None,
    candidate_result: dict[str, Any] | None,
) -> ComparisonRow:
    assert baseline.id is not None and candidate.id is not None
    row = ComparisonRow(
        baseline_job=baseline.id,
        candidate_job=candidate.id,
        kind=baseline.kind,
        formula=baseline.formula,
        natoms=baseline.natoms,
        baseline_calculator=baseline.calculator_ref,
        state=JobState(candidate.state),
        error=candidate.error,
        baseline_converged=baseline.converged,
        candidate_converged=candidate.converged,
    )
    if baseline_result is None or candidate_result is None:
        return row
    deltas = metric_deltas(
        baseline.kind, baseline.task, baseline.natoms, baseline_result, candidate_result
    )
    return row.model_copy(update=deltas)


def metric_deltas(
    kind: str, task: dict[str, Any], natoms: int, base: dict[str, Any], cand: dict[str, Any]
) -> dict[str, float]:
    """Candidate minus baseline for every metric this kind of task has."""
    deltas: dict[str, float] = {}
    if kind == "single_point":
        deltas["delta_energy_per_atom_eV"] = (cand["energy"] - base["energy"]) / natoms
        difference = np.asarray(cand["forces"], float) - np.asarray(base["forces"], float)
        deltas["max_force_delta_eV_per_A"] = float(np.linalg.norm(difference, axis=1).max())
    elif kind == "relax":
        deltas["delta_energy_per_atom_eV"] = (cand["energy"] - base["energy"]) / natoms
        if task.get("cell") is not None:
            deltas |= cell_changes(
                cell_volume(base["structure"]["cell"]),
                cell_volume(cand["structure"]["cell"]),
                cell_lengths(base["structure"]["cell"]),
                cell_lengths(cand["structure"]["cell"]),
            )
    elif kind == "neb":
        initial = (cand["profile"][0]["energy"] - base["profile"][0]["energy"]) / natoms
        deltas["delta_energy_per_atom_eV"] = initial
        deltas["barrier_change_eV"] = cand["forward_barrier"] - base["forward_barrier"]
        deltas["reaction_energy_change_eV"] = cand["reaction_energy"] - base["reaction_energy"]
    elif kind == "md":
        deltas["delta_energy_per_atom_eV"] = (
            mean_window_potential_energy(cand) - mean_window_potential_energy(base)
        ) / natoms
        b, c = base["analysis"], cand["analysis"]
        averaged = (b.get("volume_mean_A3"), c.get("volume_mean_A3"))
        lengths = (b.get("cell_lengths_mean_A"), c.get("cell_lengths_mean_A"))
        if task.get("ensemble") == "npt" and None not in averaged and None not in lengths:
            deltas |= cell_changes(*averaged, *lengths)
    return deltas


def cell_volume(cell: Sequence[Sequence[float]]) -> float:
    return float(abs(np.linalg.det(np.asarray(cell, float))))


def cell_lengths(cell: Sequence[Sequence[float]]) -> list[float]:
    return [float(x) for x in np.linalg.norm(np.asarray(cell, float), axis=1)]


def cell_changes(
    base_volume: float,
    cand_volume: float,
    base_lengths: Sequence[float],
    cand_lengths: Sequence[float],
) -> dict[str, float]:
    changes = {"volume_change_percent": percent_change(base_volume, cand_volume)}
    for axis, old, new in zip("abc", base_lengths, cand_lengths, strict=True):
        changes[f"lattice_{axis}_change_percent"] = percent_change(old, new)
    return changes


def percent_change(old: float, new: float) -> float:
    return 100.0 * (new - old) / old


def mean_window_potential_energy(result: dict[str, Any]) -> float:
    """Mean potential energy (eV) of the thermo rows inside the run's analysis window, the
    rows the worker's own averages use (all rows when none falls inside)."""
    start, end = result["analysis"]["analysis_window_fs"]
    rows = result["thermo"]
    inside = [r for r in rows if start <= r["time_fs"] <= end] or rows
    return float(np.mean([r["potential_energy"] for r in inside]))


def _ids(found: Sequence[Job]) -> str:
    listed = ", ".join(str(job.id) for job in found[:LISTED])
    return f"job{'s' if len(found) > 1 else ''} {listed}{_more(found)}"


def _more(items: Sequence[Any]) -> str:
    return f" and {len(items) - LISTED} more" if len(items) > LISTED else ""
