"""Every benchmark of atomq's overhead budget in one command: the service and its
reference measured side by side in the same run, one table of ratios, JSON for tracking.

    .venv/bin/python bench/run.py [--quick] [--only NAME ...] [--json out.json]

The stack benchmarks run on the "redis" configuration (uvicorn API, `atomq worker
--concurrency 2`, the machine's Redis on 127.0.0.1:6379 database 9, SQLite); throughput
and latency also on "embedded" (what `atomq serve` runs). The records benchmark uses SQLite
and PostgreSQL (127.0.0.1:5432, a database of its own, dropped afterwards). Benchmarks
measure; nothing asserts a time. Numbers depend on the machine and on whatever else runs
on it: the load average is recorded before and after.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
import traceback
from collections.abc import Callable
from datetime import UTC, datetime
from functools import partial
from pathlib import Path
from typing import Any

from suite import (
    cost_growth,
    latency,
    long_job,
    payload,
    records,
    throughput,
    warm_model,
)
from suite.harness import Entry, Options, Stack, machine_info

# name -> (runner, configurations); "none" runs without a shared stack.
BENCHMARKS: dict[str, tuple[Callable[..., list[Entry]], tuple[str, ...]]] = {
    "throughput": (throughput.run, ("redis", "embedded")),
    "latency": (latency.run, ("redis", "embedded")),
    "long_job": (long_job.run, ("redis",)),
    "warm_model": (warm_model.run, ("redis",)),
    "records": (records.run, ("none",)),
    "payload": (payload.run, ("redis",)),
    "cost_growth": (cost_growth.run, ("redis",)),
}


def log(message: str, started: float) -> None:
    print(f"[{time.monotonic() - started:6.1f} s] {message}", file=sys.stderr, flush=True)


def failure(name: str, config: str, exc: BaseException) -> Entry:
    traceback.print_exception(exc, file=sys.stderr)
    return Entry(name, config, "", "", note=f"failed: {type(exc).__name__}: {exc}"[:300])


def run_all(selected: list[str], options: Options, started: float) -> list[Entry]:
    entries: list[Entry] = []
    for config in ("redis", "embedded"):
        names = [n for n in selected if config in BENCHMARKS[n][1]]
        if not names:
            continue
        log(f"starting the {config} stack", started)
        try:
            stack = Stack(config, options.scratch)
            stack.start()
        except Exception as exc:
            entries.extend(failure(name, config, exc) for name in names)
            continue
        try:
            for name in names:
                log(f"{name} on {config}", started)
                runner = BENCHMARKS[name][0]
                entries.extend(measure(name, config, partial(runner, stack, options)))
        finally:
            stack.stop()
    for name in selected:
        if BENCHMARKS[name][1] == ("none",):
            log(name, started)
            entries.extend(measure(name, "", partial(BENCHMARKS[name][0], options)))
    return entries


def measure(name: str, config: str, call: Callable[[], list[Entry]]) -> list[Entry]:
    """Run one benchmark; a failure becomes its entry instead of ending the suite."""
    load = os.getloadavg()
    try:
        found = call()
    except Exception as exc:
        found = [failure(name, config, exc)]
    for entry in found:
        entry.derived["load_average_at_start"] = load
    return found


# -- the table ---------------------------------------------------------------------
def shown(value: float | None, unit: str) -> str:
    if value is None:
        return "-"
    if unit == "ms":
        return f"{value:.1f} ms"
    if unit == "s":
        return f"{value:.3g} s" if value < 10 else f"{value:.1f} s"
    return f"{value:.1f} {unit}"


def table(entries: list[Entry]) -> str:
    """The table, then the notes of entries that were not measured."""
    header = ("benchmark", "config", "workload", "measured", "reference", "ratio", "budget", "met?")
    rows, notes = [], []
    for e in entries:
        measured, reference = e.shown or (shown(e.measured, e.unit), shown(e.reference, e.unit))
        if e.note:
            notes.append(e.note)
            measured, reference = f"{e.note.split(':')[0]} (note {len(notes)})", ""
        met = "-" if e.met is None else ("yes" if e.met else "NO")
        ratio = "-" if e.ratio is None else f"{e.ratio:.3f}"
        rows.append((e.benchmark, e.config, e.label, measured, reference, ratio, e.budget, met))
    widths = [max(len(str(row[i])) for row in [header, *rows]) for i in range(len(header))]
    lines = [" | ".join(str(h).ljust(w) for h, w in zip(header, widths, strict=True))]
    lines.append("-+-".join("-" * w for w in widths))
    lines += [" | ".join(str(c).ljust(w) for c, w in zip(row, widths, strict=True)) for row in rows]
    lines += [f"note {i}: {note}" for i, note in enumerate(notes, 1)]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=" ".join(__doc__.split("\n\n")[0].split()))
    parser.add_argument("--quick", action="store_true", help="small workloads: a smoke run")
    parser.add_argument(
        "--only",
        nargs="+",
        choices=list(BENCHMARKS),
        metavar="NAME",
        help=f"run only these: {', '.join(BENCHMARKS)}",
    )
    parser.add_argument("--json", type=Path, help="where to write the JSON report")
    parser.add_argument("--no-profile", action="store_true", help="skip the pyinstrument runs")
    args = parser.parse_args()
    selected = [name for name in BENCHMARKS if not args.only or name in args.only]
    started = time.monotonic()
    load_before = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="atomq-bench-") as scratch:
        # The stacks write a client config for their token: never the user's own.
        os.environ["ATOMQ_CONFIG"] = str(Path(scratch) / "client.json")
        for variable in ("ATOMQ_URL", "ATOMQ_TOKEN"):
            os.environ.pop(variable, None)
        options = Options(quick=args.quick, scratch=Path(scratch), profile=not args.no_profile)
        report: dict[str, Any] = {
            "suite": "atomq overhead budget",
            "quick": args.quick,
            "started_at": datetime.now(UTC).isoformat(),
            "machine": machine_info(),
            "load_average_before": load_before,
        }
        entries = run_all(selected, options, started)
    report["finished_at"] = datetime.now(UTC).isoformat()
    report["duration_s"] = round(time.monotonic() - started, 1)
    report["load_average_after"] = os.getloadavg()
    report["benchmarks"] = [entry.as_json() for entry in entries]
    path = args.json or Path(tempfile.gettempdir()) / f"atomq-bench-{int(time.time())}.json"
    path.write_text(json.dumps(report, indent=1, default=str))

    machine = report["machine"]
    print()
    if args.quick:
        print("QUICK RUN: workloads shrunk for a smoke test; these numbers are not the budget's.")
    print(
        f"atomq {machine['packages']['atomq']} at {machine['git_commit'][:12]} on "
        f"{machine['cpu_model']}, {machine['cores']} cores, Python {machine['python']}; "
        f"load average {load_before[0]:.2f} before, {report['load_average_after'][0]:.2f} "
        f"after; {report['duration_s']:.0f} s"
    )
    print(table(entries))
    print(f"\nJSON: {path}")


if __name__ == "__main__":
    main()
