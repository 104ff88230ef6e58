"""The worker's per-step checks: non-finite numbers, cancel requests, time limits."""

from __future__ import annotations

import math
from pathlib import Path
from types import SimpleNamespace

import pytest

from atomq.jobs import JobState
from atomq_service.db import make_engine
from atomq_service.schema import prepare_schema
from atomq_workers.execute import ProgressWriter, Stop, Superseded


def writer(tmp_path: Path, *, time_limit_s: float = 3600.0, **lease: bool) -> ProgressWriter:
    engine = make_engine(f"sqlite:///{tmp_path / 'atomq.db'}")
    prepare_schema(engine)
    # The lease's two flags are what the heartbeat thread reports; set them directly here.
    flags = SimpleNamespace(
        lost=lease.get("lost", False), cancel_requested=lease.get("cancel", False)
    )
    return ProgressWriter(engine, 1, 1, flags, 3600.0, time_limit_s)  # type: ignore[arg-type]


@pytest.mark.parametrize("field", ["energy", "fmax", "temperature_K"])
@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_non_finite_numbers_fail_the_job_at_that_step(tmp_path: Path, field: str, value: float):
    report = writer(tmp_path)
    with pytest.raises(Stop) as stopped:
        report(7, 100, **{field: value})
    assert stopped.value.state is JobState.failed
    assert stopped.value.reason.startswith("non_finite:") and "step 7" in stopped.value.reason


def test_cancel_request_stops_at_the_current_step(tmp_path: Path) -> None:
    with pytest.raises(Stop) as stopped:
        writer(tmp_path, cancel=True)(12, 100, energy=-1.0)
    assert stopped.value.state is JobState.cancelled
    assert stopped.value.reason == "cancelled at step 12"


def test_time_limit_ends_the_job_failed(tmp_path: Path) -> None:
    report = writer(tmp_path, time_limit_s=0.0)
    with pytest.raises(Stop) as stopped:
        report(3, 100, energy=-1.0)
    assert stopped.value.state is JobState.failed
    assert stopped.value.reason.startswith("time_limit:")


def test_a_lost_lease_abandons_the_attempt(tmp_path: Path) -> None:
    with pytest.raises(Superseded):
        writer(tmp_path, lost=True)(3, 100, energy=-1.0)
