"""Model-swap reports ("comparisons"): finished jobs rerun under another calculator
version, and what moved.

Every delta is candidate minus baseline, in ASE units (eV, eV/Angstrom) or in percent of
the baseline value. What each metric compares, by task kind:

- `delta_energy_per_atom_eV`: single point: the energy of the (same) structure; relax:
  the final energy; NEB: the energy of the initial endpoint (the same structure in both,
  as NEB keeps its endpoints fixed); MD: the mean potential energy over the analysis
  window of each run. Always divided by the number of atoms.
- `max_force_delta_eV_per_A`: single points only (the one kind where both forces act on
  the same positions): the largest |F_candidate - F_baseline| over the atoms, as vectors.
- `volume_change_percent`, `lattice_{a,b,c}_change_percent`: relaxations that relax the
  cell (the final cells), and NPT runs (the cells averaged over the analysis window).
- `barrier_change_eV`, `reaction_energy_change_eV`: NEB, the forward barrier and
  E(final) - E(initial). The candidate runs the band between the baseline's endpoints;
  they are not relaxed again with the candidate model.

A metric a row does not have is None. Rows whose candidate job has not succeeded (yet)
carry its state and no deltas.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable
from datetime import datetime
from typing import TYPE_CHECKING, Annotated, Any, TextIO

from pydantic import BaseModel, ConfigDict, Field, model_validator

from atomq.jobs import JobState

if TYPE_CHECKING:  # the handle talks through a Client; the client imports this module
    import pandas

    from atomq.client import Client

# A comparison reruns at most this many jobs; select fewer by tag, or split by job ids.
MAX_COMPARISON_JOBS = 1000

LABEL_PATTERN = r"^[A-Za-z0-9_.@+-]{1,64}$"
CALCULATOR_PATTERN = r"^[A-Za-z0-9_.-]{1,64}(@[A-Za-z0-9_.-]{1,64})?$"

# The compared quantities, in the order tables show them; summary statistics use these.
METRICS: tuple[str, ...] = (
    "delta_energy_per_atom_eV",
    "max_force_delta_eV_per_A",
    "volume_change_percent",
    "lattice_a_change_percent",
    "lattice_b_change_percent",
    "lattice_c_change_percent",
    "barrier_change_eV",
    "reaction_energy_change_eV",
)


class ComparisonCreate(BaseModel):
    """Rerun a set of finished jobs under another calculator version: the jobs with
    `tag`, or the jobs `job_ids`, optionally only those run with `baseline_calculator`."""

    model_config = ConfigDict(extra="forbid")
    tag: Annotated[str, Field(pattern=LABEL_PATTERN)] | None = Field(
        default=None, description="Compare every job with this tag."
    )
    job_ids: list[Annotated[int, Field(ge=1, le=2**31 - 1)]] | None = Field(
        default=None,
        min_length=1,
        max_length=MAX_COMPARISON_JOBS,
        description="Compare exactly these jobs.",
    )
    baseline_calculator: str | None = Field(
        default=None,
        pattern=CALCULATOR_PATTERN,
        description="Only jobs run with this calculator: 'name' (any version) or 'name@version'.",
    )
    calculator: str = Field(
        pattern=CALCULATOR_PATTERN,
        description="The candidate: 'name' pins the newest version, 'name@version' an exact one.",
    )
    tags: list[Annotated[str, Field(pattern=LABEL_PATTERN)]] = Field(
        default_factory=list,
        max_length=31,
        description="Extra labels for the new jobs (each also gets 'comparison-<id>').",
    )
    time_limit_s: float | None = Field(
        default=None,
        gt=0,
        description="Wall-time limit of each new job; the service's own limit if absent.",
    )
    reuse: bool = Field(
        default=True,
        description="Set false to compute every rerun again even where an identical finished "
        "job exists (same structure, task, calculator version and seed).",
    )

    @model_validator(mode="after")
    def _one_selection(self) -> ComparisonCreate:
        if (self.tag is None) == (self.job_ids is None):
            raise ValueError("choose the jobs to compare with either `tag` or `job_ids`")
        return self


class ComparisonRow(BaseModel):
    """One baseline job and its rerun. See the module's docstring for the metrics."""

    baseline_job: int
    candidate_job: int
    kind: str
    formula: str
    natoms: int
    baseline_calculator: str
    state: JobState = Field(description="The candidate job's state.")
    error: str | None = Field(default=None, description="Why the candidate job failed.")
    baseline_converged: bool | None = Field(default=None, description="Relax and NEB.")
    candidate_converged: bool | None = Field(default=None, description="Relax and NEB.")
    delta_energy_per_atom_eV: float | None = None
    max_force_delta_eV_per_A: float | None = None
    volume_change_percent: float | None = None
    lattice_a_change_percent: float | None = None
    lattice_b_change_percent: float | None = None
    lattice_c_change_percent: float | None = None
    barrier_change_eV: float | None = None
    reaction_energy_change_eV: float | None = None


class MetricSummary(BaseModel):
    """Statistics of one metric over the rows that have it (None when none has)."""

    count: int
    mean: float | None
    mean_abs: float | None
    rms: float | None
    max_abs: float | None


class ComparisonPublic(BaseModel):
    """A model-swap report as the service gives it."""

    id: int
    owner: str
    calculator: str = Field(description="The candidate version, name@version.")
    selection: str = Field(description="How the baseline jobs were chosen.")
    tag: str = Field(description="The label every candidate job carries.")
    created_at: datetime
    complete: bool = Field(description="True once every candidate job has finished.")
    rows: list[ComparisonRow]
    summary: dict[str, MetricSummary] = Field(description="Per metric, over the rows.")


def summarize(values: Iterable[float | None]) -> MetricSummary:
    """count, mean, mean absolute, root mean square and largest absolute value."""
    present = [v for v in values if v is not None]
    if not present:
        return MetricSummary(count=0, mean=None, mean_abs=None, rms=None, max_abs=None)
    n = len(present)
    return MetricSummary(
        count=n,
        mean=math.fsum(present) / n,
        mean_abs=math.fsum(abs(v) for v in present) / n,
        rms=math.sqrt(math.fsum(v * v for v in present) / n),
        max_abs=max(abs(v) for v in present),
    )


def table(report: ComparisonPublic) -> list[dict[str, Any]]:
    """The rows as flat records (states as text), one per baseline job."""
    return [row.model_dump(mode="json") for row in report.rows]


def write_csv(report: ComparisonPublic, stream: TextIO) -> None:
    """The rows as CSV with a header row; an absent value is an empty field. Floats are
    written in Python's shortest round-trip form, so they read back exactly."""
    import csv

    writer = csv.DictWriter(stream, fieldnames=list(ComparisonRow.model_fields))
    writer.writeheader()
    for record in table(report):
        writer.writerow({k: "" if v is None else v for k, v in record.items()})


class Comparison:
    """A handle to one model-swap report: `report()`, `wait()`, `dataframe()`."""

    def __init__(self, client: Client, comparison_id: int, report: ComparisonPublic) -> None:
        self.client = client
        self.id = comparison_id
        self._report = report

    def __repr__(self) -> str:
        done = "complete" if self._report.complete else "running"
        return f"Comparison({self.id}, {self._report.calculator}, {done})"

    def report(self) -> ComparisonPublic:
        """Fetch the report as it stands: rows of unfinished candidate jobs have no deltas."""
        response = self.client.request("GET", f"/v1/comparisons/{self.id}")
        self._report = ComparisonPublic.model_validate_json(response.content)
        return self._report

    def wait(self, timeout: float | None = None, *, poll_interval: float = 1.0) -> ComparisonPublic:
        """Block until every candidate job has finished; TimeoutError after `timeout` s."""
        deadline = None if timeout is None else time.monotonic() + timeout
        interval = min(poll_interval, 0.05)
        while True:
            report = self.report()
            if report.complete:
                return report
            if deadline is not None and time.monotonic() >= deadline:
                pending = sum(not row.state.finished for row in report.rows)
                raise TimeoutError(
                    f"comparison {self.id}: {pending} of {len(report.rows)} candidate jobs "
                    f"still running after {timeout} s; call wait() again or raise the timeout"
                )
            time.sleep(interval)
            interval = min(interval * 2, poll_interval)

    def dataframe(self) -> pandas.DataFrame:
        """The current report's rows as a pandas DataFrame, one row per baseline job."""
        try:
            import pandas
        except ImportError as exc:
            raise ImportError(
                "Comparison.dataframe() needs pandas: pip install pandas "
                "(or use report().rows, which needs nothing more)"
            ) from exc
        return pandas.DataFrame(table(self.report()), columns=list(ComparisonRow.model_fields))
