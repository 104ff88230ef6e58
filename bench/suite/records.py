"""(5) Scale of the records: list and filter calls with 100 000 jobs in the database
(SQLite and PostgreSQL), statements per call, and accepting a 10 000-structure batch."""

from __future__ import annotations

import hashlib
import time
import uuid
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import timedelta
from typing import Any

import numpy as np
from ase.build import bulk
from sqlalchemy import Engine, event, insert, text
from sqlmodel import select

from atomq import MD, Relax, SinglePoint, Structure
from atomq_service.db import make_engine
from atomq_service.models import Calculator, Job, JobTag, User, utcnow
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_workers.main import register_shipped
from suite import profiling
from suite.harness import POSTGRES_ADMIN_URL, Entry, Options, Stack, not_available, summary
from suite.profiling import InProcessService
from suite.workloads import rattled_cu32

BUDGET_LIST_P50_MS = 50.0
BUDGET_BATCH_S = 10.0
CHUNK = 5_000
PROFILED_BATCH = 1_000

# A made-up lab: its members, and the share of each calculator, state and task in its
# history of jobs.
OWNERS = ["ines", "tomas", "wren", "oskar", "mei", "kofi", "lena", "ravi", "sigrid", "bram"]
CALCULATOR_SHARES = {
    "emt@1": 0.45,
    "sevennet-0@2024-07-11": 0.20,
    "chgnet@0.3.0": 0.15,
    "morse-cu@1": 0.10,
    "sevennet-0@2024-05-22": 0.05,
    "lj-argon@1": 0.05,
}
FINISHED_SHARES = {"succeeded": 0.89, "failed": 0.07, "cancelled": 0.04}
# The newest 3 % of the jobs: still waiting or running, a few already done.
RECENT = 0.03
RECENT_SHARES = {"queued": 0.6, "running": 0.3, "succeeded": 0.1}
KIND_SHARES = {"single_point": 0.6, "relax": 0.3, "md": 0.1}
STUDY_TAGS = 200  # study-000 ... study-199, used with Zipf-like frequencies
EXTRA_TAGS = ["screening", "convergence-check", "paper-draft", "benchmark-set"]


def job_count(options: Options) -> int:
    return 5_000 if options.quick else 100_000


def batch_size(options: Options) -> int:
    return 1_000 if options.quick else 10_000


def list_calls(options: Options) -> int:
    return 5 if options.quick else 50


# -- the database ------------------------------------------------------------------
@contextmanager
def postgres_database() -> Iterator[str]:
    import psycopg

    name = f"atomq_bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(POSTGRES_ADMIN_URL, autocommit=True, connect_timeout=5) as admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}"
    finally:
        with psycopg.connect(POSTGRES_ADMIN_URL, autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def _weighted(rng: np.random.Generator, shares: dict[str, float], n: int) -> list[str]:
    names = list(shares)
    weights = np.array([shares[k] for k in names])
    return [names[i] for i in rng.choice(len(names), size=n, p=weights / weights.sum())]


def fill(engine: Engine, n: int, seed: int = 11) -> dict[str, Any]:
    """Write `n` jobs of a lab's history straight into the tables, in bulk."""
    rng = np.random.default_rng(seed)
    prepare_schema(engine)
    seed_defaults(engine)
    register_shipped(engine)  # the ML versions a worker with sevenn and chgnet registers
    with engine.begin() as connection:
        connection.execute(insert(User), [{"name": name, "role": "member"} for name in OWNERS])
        owners: dict[str, int] = {
            name: id_ for name, id_ in connection.execute(select(User.name, User.id)).all()
        }
        calculators: dict[str, int] = {
            f"{name}@{version}": id_
            for name, version, id_ in connection.execute(
                select(Calculator.name, Calculator.version, Calculator.id)
            ).all()
        }
    shares = {ref: s for ref, s in CALCULATOR_SHARES.items() if ref in calculators}
    structures = {
        "Cu": [
            Structure.from_atoms(a).model_dump(mode="json")
            for a in (
                bulk("Cu", "fcc", a=3.61),
                bulk("Cu", "fcc", a=3.61, cubic=True),
                bulk("Cu", "fcc", a=3.61).repeat(2),
                bulk("Cu", "fcc", a=3.61, cubic=True).repeat(2),
            )
        ],
        "Ar": [Structure.from_atoms(bulk("Ar", "fcc", a=5.26, cubic=True)).model_dump(mode="json")],
    }
    sizes = {"Cu": [1, 4, 8, 32], "Ar": [4]}
    size_shares = [0.3, 0.4, 0.2, 0.1]
    tasks = {
        "single_point": SinglePoint().model_dump(mode="json"),
        "relax": Relax(fmax=0.02).model_dump(mode="json"),
        "md": MD(
            ensemble="nvt", thermostat="langevin", temperature_K=600, timestep_fs=2, steps=5000
        ).model_dump(mode="json"),
    }
    refs = _weighted(rng, shares, n)
    recent = int(n * RECENT)
    states = _weighted(rng, FINISHED_SHARES, n - recent) + _weighted(rng, RECENT_SHARES, recent)
    kinds = _weighted(rng, KIND_SHARES, n)
    owner_names = [OWNERS[i] for i in rng.zipf(1.6, size=n) % len(OWNERS)]
    zipf = 1.0 / np.arange(1, STUDY_TAGS + 1)
    study = rng.choice(STUDY_TAGS, size=n, p=zipf / zipf.sum())
    extra = rng.random(n)
    now = utcnow()
    start = now - timedelta(days=365)
    step = timedelta(days=365) / n
    counts: Counter[str] = Counter()
    bytes_stored = 0
    with engine.begin() as connection:
        for low in range(0, n, CHUNK):
            jobs, tags = [], []
            for i in range(low, min(low + CHUNK, n)):
                element = "Ar" if refs[i].startswith("lj") else "Cu"
                choice = 0 if element == "Ar" else int(rng.choice(4, p=size_shares))
                structure = structures[element][choice]
                bytes_stored += len(str(structure))
                created = start + step * i
                state = states[i]
                finished = state in ("succeeded", "failed", "cancelled")
                task = dict(tasks[kinds[i]])
                if kinds[i] == "md":
                    task["seed"] = i
                jobs.append(
                    {
                        "id": i + 1,
                        "owner_id": owners[owner_names[i]],
                        "state": state,
                        "kind": kinds[i],
                        "calculator_id": calculators[refs[i]],
                        "calculator_ref": refs[i],
                        "task": task,
                        "structure": structure,
                        "natoms": sizes[element][choice],
                        "formula": f"{element}{sizes[element][choice]}",
                        "input_hash": hashlib.sha256(f"bench-{i}".encode()).hexdigest(),
                        "seed": i if kinds[i] == "md" else None,
                        "parents": [],
                        "time_limit_s": 7 * 24 * 3600.0,
                        "attempts": 0 if state == "queued" else 1,
                        "lease_expires_at": now + timedelta(days=1) if state == "running" else None,
                        "dispatched_at": created if state != "queued" else now,
                        "converged": True if kinds[i] == "relax" and finished else None,
                        "error": "non_finite: the energy became nan at step 12"
                        if state == "failed"
                        else None,
                        "worker": None if state == "queued" else "node-b:4242",
                        "created_at": created,
                        "started_at": None if state == "queued" else created + timedelta(seconds=2),
                        "finished_at": created + timedelta(seconds=40) if finished else None,
                    }
                )
                tags.append({"job_id": i + 1, "tag": f"study-{study[i]:03d}"})
                if extra[i] < 0.3:
                    tags.append({"job_id": i + 1, "tag": EXTRA_TAGS[int(extra[i] * 40) % 4]})
                counts[state] += 1
            connection.execute(insert(Job), jobs)
            connection.execute(insert(JobTag), tags)
        if engine.dialect.name == "postgresql":
            # Continue the id sequence after the explicit ids written above.
            connection.execute(text("SELECT setval('job_id_seq', (SELECT max(id) FROM job))"))
    if engine.dialect.name == "postgresql":
        # What autovacuum does soon after a bulk load; SQLite keeps no statistics by default.
        with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as connection:
            connection.execute(text("ANALYZE"))
    return {
        "jobs": n,
        "states": dict(counts),
        "mean_structure_json_bytes": round(bytes_stored / n),
        "tags_per_job": round(1 + float((extra < 0.3).mean()), 2),
    }


# -- the calls -------------------------------------------------------------------
def filters() -> dict[str, dict[str, str]]:
    return {
        "none (newest 100)": {},
        "state=failed": {"state": "failed"},
        "calculator=sevennet-0": {"calculator": "sevennet-0"},
        "tag=study-004": {"tag": "study-004"},
        "owner=lena": {"owner": "lena"},
        "state=queued&calculator=emt": {"state": "queued", "calculator": "emt"},
    }


def time_list_calls(stack: Stack, calls: int) -> dict[str, Any]:
    timings: dict[str, Any] = {}
    with stack.client() as client:
        for name, params in filters().items():
            for _ in range(3):
                client.jobs(**params)  # type: ignore[arg-type]
            samples = []
            for _ in range(calls):
                start = time.perf_counter()
                page = client.jobs(**params)  # type: ignore[arg-type]
                samples.append((time.perf_counter() - start) * 1000)
            timings[name] = {**summary(samples), "matching": page.total, "samples_ms": samples}
    return timings


def statements_per_call(options: Options, database_url: str) -> dict[str, Any]:
    """SQL statements one list call sends, at page sizes 10 and 100: equal counts mean no
    query per row (no N+1). The statements of the last call are kept, shortened."""
    counted: dict[str, Any] = {}
    directory = options.scratch / f"records-statements-{uuid.uuid4().hex[:8]}"
    with InProcessService(directory, database_url) as service:
        seen: list[str] = []

        def count(_conn: Any, _cursor: Any, statement: str, *_args: Any) -> None:
            if statement.lstrip().upper().startswith(("SELECT", "INSERT", "UPDATE", "DELETE")):
                seen.append(statement)

        event.listen(service.engine, "before_cursor_execute", count)
        try:
            for name, params in filters().items():
                counted[name] = {}
                for limit in (10, 100):
                    seen.clear()
                    service.client.jobs(**params, limit=limit)  # type: ignore[arg-type]
                    counted[name][f"limit={limit}"] = len(seen)
            counted["statements of the last call"] = [" ".join(q.split())[:120] for q in seen]
        finally:
            event.remove(service.engine, "before_cursor_execute", count)
    return counted


def accept_batch(stack: Stack, n: int) -> dict[str, Any] | str:
    structures = [rattled_cu32(seed) for seed in range(50_000, 50_000 + n)]
    with stack.client() as client:
        submit_batch = getattr(client, "submit_batch", None)
        if submit_batch is None:
            return "the client has no submit_batch yet (the batch route is being built)"
        start = time.perf_counter()
        batch = submit_batch(structures, SinglePoint(), calculator="emt", tags=["bench-batch"])
        accepted = time.perf_counter() - start
        return {"accept_s": accepted, "batch_id": batch.id}


def run_one(options: Options, database: str, database_url: str) -> list[Entry]:
    n = job_count(options)
    engine = make_engine(database_url)
    start = time.perf_counter()
    filled = fill(engine, n)
    filled["fill_s"] = time.perf_counter() - start
    if database == "postgresql":
        # What autovacuum does within a minute of a bulk load (its insert threshold): the
        # planner's statistics and the visibility map a lab's database always has.
        with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as connection:
            connection.exec_driver_sql("VACUUM ANALYZE")
    engine.dispose()
    entries = []
    with Stack("redis", options.scratch, workers=0, database_url=database_url) as stack:
        # The API's reconciler re-sends every queued job on its first look at an emptied
        # broker, 5 s after start: let that pass before timing (a smoke run does not wait).
        if not options.quick:
            time.sleep(stack.settings.reconcile_interval_s + 2)
        timings = time_list_calls(stack, list_calls(options))
        counts = statements_per_call(options, database_url)
        worst = max(t["p50"] for t in timings.values())
        entries.append(
            Entry(
                "records: list",
                database,
                f"GET /v1/jobs x6 filters, {n} jobs",
                f"{n} jobs of a made-up lab's year (10 members, 6 calculator versions; "
                "about 89 % succeeded, 7 % failed, 4 % cancelled, and among the newest 3 % "
                "the queued and running ones; 1-32 atom cells; one of 200 study tags each, "
                "Zipf-distributed, 30 % a second tag) bulk-inserted into the real tables "
                "(no results: listing does not read them); on PostgreSQL then VACUUM ANALYZE, "
                "as autovacuum does within a minute of such a load; then client.jobs() through the "
                f"uvicorn API (page of 100, newest first) with each filter, {list_calls(options)} "
                "calls each after 3 unrecorded: milliseconds, p50 and p95. Measured: the "
                "slowest filter's p50. Statements per call counted in-process with a "
                "SQLAlchemy event listener at page sizes 10 and 100.",
                measured=worst,
                unit="ms",
                budget=f"p50 <= {BUDGET_LIST_P50_MS:g} ms (each filter)",
                met=worst <= BUDGET_LIST_P50_MS,
                derived={
                    "database": filled,
                    "per_filter_ms": {
                        k: {m: v for m, v in t.items() if m != "samples_ms"}
                        for k, t in timings.items()
                    },
                    "sql_statements_per_call": counts,
                    "n_plus_one": any(
                        len(set(c.values())) > 1 for c in counts.values() if isinstance(c, dict)
                    ),
                },
                samples={k: t["samples_ms"] for k, t in timings.items()},
            )
        )
        size = batch_size(options)
        label = f"{size}-structure batch accepted"
        workload = (
            f"client.submit_batch of {size} distinct 32-atom Cu cells (EMT single points) "
            f"into the database above: seconds until the service has accepted the batch "
            "(encode, send, validate, record, publish; no worker runs them)."
        )
        batch = accept_batch(stack, size)
        if isinstance(batch, str):
            entries.append(not_available("records: batch", database, label, workload, batch))
        else:
            entries.append(
                Entry(
                    "records: batch",
                    database,
                    label,
                    workload,
                    measured=batch["accept_s"],
                    unit="s",
                    budget=f"<= {BUDGET_BATCH_S:g} s",
                    met=batch["accept_s"] <= BUDGET_BATCH_S,
                    derived=batch,
                )
            )
            if options.profile and database == "sqlite":
                structures = [rattled_cu32(seed) for seed in range(PROFILED_BATCH)]
                entries[-1].derived["profile"] = profiling.batch_accept(options.scratch, structures)
    return entries


def run(options: Options) -> list[Entry]:
    import psycopg

    entries = run_one(options, "sqlite", f"sqlite:///{options.scratch / 'records.db'}")
    try:
        with postgres_database() as url:
            entries.extend(run_one(options, "postgresql", url))
    except psycopg.OperationalError as exc:
        why = f"no PostgreSQL at 127.0.0.1:5432 ({exc})"
        entries.append(not_available("records: list", "postgresql", "", "", why))
    return entries
