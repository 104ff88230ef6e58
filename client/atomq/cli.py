"""The `atomq` command line.

Client commands (submit, jobs, show, fetch, cancel, calculators) need only this
package. Server commands (serve, worker, demo, users) need `atomq[server]` and
import it only when called.
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from atomq.client import Client, Job
from atomq.errors import AtomqError
from atomq.tasks import MD, NEB, CellRelax, JobReference, Relax, SinglePoint, Task

SERVER_EXTRA_HINT = "this command needs the server parts: pip install 'atomq[server]'"
FRESH_HELP = "compute again even if an identical job already succeeded (default: reuse it)"


def _server_settings(args: argparse.Namespace) -> Any:
    try:
        from atomq_service.settings import Settings
    except ImportError as exc:
        raise SystemExit(f"{SERVER_EXTRA_HINT} ({exc})") from exc
    overrides: dict[str, Any] = {}
    for option in ("data_dir", "database_url", "broker_url"):
        value = getattr(args, option, None)
        if value:
            overrides[option] = value
    return Settings(**overrides)


def _add_server_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--data-dir", help="where SQLite, artifacts and the broker live")
    parser.add_argument(
        "--database", dest="database_url", help="e.g. postgresql+psycopg://user@host/atomq"
    )
    parser.add_argument("--broker", dest="broker_url", help="e.g. redis://host:6379/0")


# -- server commands ----------------------------------------------------------
def cmd_serve(args: argparse.Namespace) -> int:
    settings = _server_settings(args)
    from atomq_service.embedded import EmbeddedStack
    from atomq_service.schema import SchemaError
    from atomq_service.settings import hide_password

    stack = EmbeddedStack(settings, host=args.host, port=args.port, workers=args.workers)
    try:
        stack.start()
    except SchemaError as exc:
        raise SystemExit(f"atomq serve: {exc}") from exc
    print(f"atomq is serving on {stack.url} with {args.workers} worker process(es)")
    print(f"database: {hide_password(stack.settings.resolved_database_url)}")
    print(f"broker:   {hide_password(stack.settings.broker_url or '')}")
    print("the client config for this machine's user is written; Ctrl-C stops everything")
    stack.wait()
    return 0


def cmd_worker(args: argparse.Namespace) -> int:
    settings = _server_settings(args)
    try:
        from atomq_workers.main import run_worker
    except ImportError as exc:
        raise SystemExit(f"{SERVER_EXTRA_HINT} ({exc})") from exc
    selection = [ref for item in args.calculators for ref in item.split(",") if ref]
    run_worker(settings, args.concurrency, args.loglevel, selection or None)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    settings = _server_settings(args)
    from atomq_service.demo import run_demo

    return run_demo(settings, port=args.port)


def cmd_users_add(args: argparse.Namespace) -> int:
    settings = _server_settings(args)
    from atomq_service.db import make_engine
    from atomq_service.schema import SchemaError, prepare_schema
    from atomq_service.users import add_user

    if settings.database_url is None:
        settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url)
    try:
        prepare_schema(engine, settings)
    except SchemaError as exc:
        raise SystemExit(f"atomq users add: {exc}") from exc
    token = add_user(engine, args.name, role="admin" if args.admin else "member")
    print(token)
    print(f"(the token for {args.name}; it is shown only this once)", file=sys.stderr)
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    settings = _server_settings(args)
    from atomq_service.db import make_engine
    from atomq_service.verify import verify_artifacts

    engine = make_engine(settings.resolved_database_url)
    checked, problems = verify_artifacts(engine, settings.artifacts_dir)
    for p in problems:
        print(f"artifact {p.artifact_id} ({p.name}) of job {p.job_id}: {p.problem}")
    print(f"checked {checked} artifacts: {len(problems)} do not match their records")
    return 1 if problems else 0


def cmd_db(args: argparse.Namespace) -> int:
    """Schema revisions and backups of the service's database (an admin's commands)."""
    settings = _server_settings(args)
    from atomq_service import schema
    from atomq_service.db import make_engine
    from atomq_service.settings import hide_password

    if args.db_command == "history":
        newest = schema.head()
        for revision, description in schema.history():
            marker = " (newest)" if revision == newest else ""
            print(f"{revision}{marker}  {description.splitlines()[0] if description else ''}")
        return 0
    url = settings.resolved_database_url
    if settings.database_url is None and not (settings.data_dir / "atomq.db").exists():
        raise SystemExit(
            f"atomq db: no database in {settings.data_dir}; pass --data-dir or --database"
        )
    try:
        if args.db_command == "backup":
            saved = schema.backup(url, Path(args.path))
            print(f"backed up {hide_password(url)} to {saved}")
            return 0
        engine = make_engine(url)
        try:
            state = schema.current(engine)
            if args.db_command == "current":
                newest = schema.head()
                print(f"{hide_password(url)}: {state.describe()} (this atomq's newest: {newest})")
                return 0 if state.revision == newest else 1
            if settings.database_url is None and not state.empty:
                print(f"backed up to {schema.backup_beside(settings, state)}")
            before, after = schema.upgrade(engine)
            print(f"{hide_password(url)}: upgraded from {before} to revision {after}")
            return 0
        finally:
            engine.dispose()
    except schema.SchemaError as exc:
        raise SystemExit(f"atomq db {args.db_command}: {exc}") from exc


# -- client commands ----------------------------------------------------------
def _client(args: argparse.Namespace) -> Client:
    return Client(args.url, args.token)


def task_from_options(args: argparse.Namespace) -> Task:
    """The task the submit options describe; pydantic names any option that is wrong."""
    if args.task == "single_point":
        return SinglePoint()
    if args.task == "relax":
        return Relax(
            optimizer=args.optimizer,
            fmax=args.fmax,
            max_steps=args.max_steps,
            cell=CellRelax(scalar_pressure=args.pressure) if args.relax_cell else None,
        )
    return MD(
        ensemble=args.ensemble,
        thermostat=args.thermostat,
        temperature_K=args.temperature,
        timestep_fs=args.timestep,
        steps=args.steps,
        pressure_GPa=args.pressure_gpa,
        seed=args.seed,
        frame_interval=args.frame_interval,
        thermo_interval=args.frame_interval,
    )


def cmd_submit(args: argparse.Namespace) -> int:
    import ase.io

    try:
        task = task_from_options(args)
    except ValueError as exc:
        raise SystemExit(f"atomq submit: {exc}") from exc
    images = ase.io.read(args.file, index=":")
    with _client(args) as client:
        if args.batch:
            assert not isinstance(task, NEB)  # submit offers single_point, relax and md
            batch = client.submit_batch(
                list(images), task, calculator=args.calculator, tags=args.tag, reuse=not args.fresh
            )
            print(f"batch {batch.id}")
            for job_id in batch.info().job_ids:
                print(job_id)
            if args.wait:
                info = batch.wait(progress=True)
                counts = ", ".join(f"{n} {state}" for state, n in sorted(info.counts.items()))
                print(f"batch {batch.id} finished: {counts}")
            return 0
        for atoms in images:
            with _warnings_said():
                job = client.submit(
                    atoms, task, calculator=args.calculator, tags=args.tag, reuse=not args.fresh
                )
            print(job.id)
            _say_pinned(args.calculator, job)
            if args.wait:
                _report_when_done(job)
    return 0


def cmd_submit_neb(args: argparse.Namespace) -> int:
    import ase.io

    def endpoint(text: str) -> Any:
        # A number is a finished job whose final structure is used; anything else a file.
        return JobReference(job=int(text)) if text.isdigit() else ase.io.read(text)

    try:
        task = NEB(
            initial=endpoint(args.initial),
            final=endpoint(args.final),
            images=args.images,
            climb=args.climb,
            interpolation=args.interpolation,
            fmax=args.fmax,
            max_steps=args.max_steps,
        )
    except ValueError as exc:
        raise SystemExit(f"atomq submit-neb: {exc}") from exc
    with _client(args) as client:
        with _warnings_said():
            job = client.submit(
                None, task, calculator=args.calculator, tags=args.tag, reuse=not args.fresh
            )
        print(job.id)
        _say_pinned(args.calculator, job)
        if args.wait:
            _report_when_done(job)
    return 0


@contextmanager
def _warnings_said() -> Iterator[None]:
    """The client's warnings (a job no live worker can run) as one plain line each."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield
    for warning in caught:
        print(f"warning: {warning.message}", file=sys.stderr)


def _say_pinned(asked: str, job: Job) -> None:
    """On stderr (stdout keeps the bare ids for scripts): the exact version that runs."""
    pinned = job.calculator
    if "@" not in asked:
        print(f"job {job.id}: {asked!r} pinned to {pinned}, its default version", file=sys.stderr)


def _report_when_done(job: Job) -> None:
    info = job.wait(progress=True)
    note = " (NOT CONVERGED: max_steps reached)" if info.converged is False else ""
    if info.reused_from is not None:
        note += f" (reused from job {info.reused_from})"
    print(f"job {job.id} {info.state.value}{note}" + (f": {info.error}" if info.error else ""))


def utc_time(text: str) -> datetime:
    """An ISO 8601 date or time; one without a timezone is taken as UTC."""
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        example = "2025-03-01 or 2025-03-01T14:30+01:00"
        raise argparse.ArgumentTypeError(
            f"{text!r} is not an ISO 8601 date or time (e.g. {example})"
        ) from None
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=UTC)


def cmd_jobs(args: argparse.Namespace) -> int:
    package, version = None, None
    if args.package is not None:
        package, equals, version = args.package.partition("==")
        if equals and not version:
            raise SystemExit(f"atomq jobs: --package {args.package}: give a version after ==")
    with _client(args) as client:
        page = client.jobs(
            state=args.state,
            owner=args.owner,
            calculator=args.calculator,
            kind=args.kind,
            tag=args.tag,
            weights_sha256=args.weights_sha256,
            package=package,
            package_version=version or None,
            created_after=args.since,
            created_before=args.until,
            limit=args.limit,
        )
    print(f"{'id':>6}  {'state':<9}  {'kind':<12}  {'calculator':<16}  {'formula':<14}  owner")
    for job in page.items:
        flag = "  NOT CONVERGED" if job.converged is False else ""
        if job.reused_from is not None:
            flag += f"  reused from job {job.reused_from}"
        print(
            f"{job.id:>6}  {job.state.value:<9}  {job.kind:<12}  {job.calculator:<16}  "
            f"{job.formula:<14}  {job.owner}{flag}"
        )
    print(f"({len(page.items)} of {page.total})")
    return 0


def cmd_show(args: argparse.Namespace) -> int:
    with _client(args) as client:
        job = client.job(args.id)
        info = job.info()
        document: dict[str, Any] = {"job": info.model_dump(mode="json")}
        if info.reused_from is not None:  # stderr, like the warning below: stdout is JSON
            print(
                f"job {info.id}: reused from job {info.reused_from} (same input hash; the "
                "result was not computed again, its provenance names that job)",
                file=sys.stderr,
            )
        if info.state.value == "succeeded":
            with warnings.catch_warnings():  # said below, once, in the CLI's own words
                warnings.simplefilter("ignore")
                result = job.result().model_dump(mode="json")
            result.pop("structure", None)
            result.pop("forces", None)
            if result.get("kind") == "relax":
                result["trace"] = f"{len(result['trace'])} steps"
            if info.converged is False:
                print("WARNING: NOT CONVERGED within max_steps", file=sys.stderr)
            document["result"] = result
            document["provenance"] = job.provenance().model_dump(mode="json")
    print(json.dumps(document, indent=2))
    return 0


def cmd_fetch(args: argparse.Namespace) -> int:
    import ase.io

    with _client(args) as client:
        job = client.job(args.id)
        if args.artifact:
            job.wait(args.timeout)
            job.download(args.artifact, args.output)
        else:
            ase.io.write(args.output, job.atoms(timeout=args.timeout))
    print(f"wrote {args.output}")
    return 0


def cmd_cancel(args: argparse.Namespace) -> int:
    with _client(args) as client:
        info = client.job(args.id).cancel()
    note = " (stops at its next step)" if info.cancel_requested and not info.state.finished else ""
    print(f"job {info.id} {info.state.value}{note}")
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    from atomq.comparisons import write_csv

    with _client(args) as client:
        if args.id is not None:
            comparison = client.comparison(args.id)
        elif not args.calculator:
            raise SystemExit("atomq compare: give the candidate with --calculator name@version")
        else:
            comparison = client.compare(
                args.calculator,
                tag=args.tag,
                job_ids=args.job or None,
                baseline_calculator=args.baseline_calculator,
                reuse=not args.fresh,
            )
        report = comparison.wait(args.timeout) if args.wait else comparison.report()
    _print_comparison(report)
    if args.csv:
        with open(args.csv, "w", newline="", encoding="utf-8") as handle:
            write_csv(report, handle)
        print(f"wrote {args.csv}")
    return 0


def _print_comparison(report: Any) -> None:
    """The table in readable units (the CSV keeps full precision, in eV)."""

    def number(value: float | None, scale: float = 1.0) -> str:
        return "" if value is None else f"{value * scale:+.4g}"

    done = "complete" if report.complete else "candidate jobs still running"
    print(f"comparison {report.id}: {report.selection}, rerun with {report.calculator} ({done})")
    print(f"new jobs are tagged {report.tag}")
    header = ("base", "cand", "kind", "formula", "state", "dE meV/atom", "max|dF| eV/A",
              "dV %", "d barrier eV")  # fmt: skip
    print(f"{header[0]:>6} {header[1]:>6}  {header[2]:<12} {header[3]:<14} {header[4]:<9} "
          f"{header[5]:>12} {header[6]:>12} {header[7]:>10} {header[8]:>12}")  # fmt: skip
    for row in report.rows:
        print(
            f"{row.baseline_job:>6} {row.candidate_job:>6}  {row.kind:<12} {row.formula:<14} "
            f"{row.state.value:<9} {number(row.delta_energy_per_atom_eV, 1000):>12} "
            f"{number(row.max_force_delta_eV_per_A):>12} {number(row.volume_change_percent):>10} "
            f"{number(row.barrier_change_eV):>12}"
        )
    for metric, stats in report.summary.items():
        if stats.count:
            print(
                f"{metric}: n={stats.count} mean={stats.mean:+.4g} mean|x|={stats.mean_abs:.4g} "
                f"rms={stats.rms:.4g} max|x|={stats.max_abs:.4g}"
            )
    print("Model output: validate against experiment or higher-level theory before any design "
          "or safety decision.")  # fmt: skip


def cmd_calculators(args: argparse.Namespace) -> int:
    with _client(args) as client:
        calculators = client.calculators()
    for c in calculators:
        status = "retired" if c.retired else ("default" if c.is_default else "active")
        where = ", ".join(c.workers) if c.workers else "no live worker"
        print(
            f"{c.ref:<28} {status:<8} backend={c.backend:<14} jobs={c.jobs_run:<6} workers: {where}"
        )
    return 0


def cmd_calculators_show(args: argparse.Namespace) -> int:
    with _client(args) as client:
        c = client.calculator(args.ref)
    state = "retired" if c.retired else "active"
    print(f"{c.ref}  ({state}{f', the default version of {c.name}' if c.is_default else ''})")
    print(f"  backend     {c.backend}")
    print(f"  parameters  {json.dumps(c.parameters, sort_keys=True)}")
    weights = c.weights_path or ("shipped in the backend's package" if c.weights_sha256 else "")
    if c.weights_sha256:
        print(f"  weights     {weights} ({c.weights_size or 0:,} bytes)")
        print(f"  sha256      {c.weights_sha256}")
    print(f"  elements    {' '.join(c.elements)}")
    print(f"  jobs run    {c.jobs_run}")
    print(f"  workers     {', '.join(c.workers) or 'none live can run it'}")
    for worker, why in c.unavailable.items():
        print(f"  not on      {worker}: {why}")
    print(f"  registered  {c.created_at:%Y-%m-%d %H:%M} UTC")
    if c.notes:
        print(f"  notes       {c.notes}")
    return 0


def cmd_calculators_add(args: argparse.Namespace) -> int:
    from atomq.admin import CalculatorCreate

    try:
        parameters = json.loads(args.parameters)
    except json.JSONDecodeError as exc:
        raise SystemExit(
            f"--parameters is not JSON ({exc}); write e.g. '{{\"model\": 1}}'"
        ) from None
    name, _, version = args.ref.partition("@")
    record = CalculatorCreate(
        name=name,
        version=version,
        backend=args.backend,
        parameters=parameters,
        elements=[e for item in args.elements for e in item.split(",") if e],
        notes=args.notes,
        weights_path=str(Path(args.weights).resolve()) if args.weights else None,
        weights_sha256=args.sha256,
    )
    with _client(args) as client:
        c = client.register_calculator(record)
    print(
        f"registered {c.ref}"
        + (f" (weights sha256 {c.weights_sha256})" if c.weights_sha256 else "")
    )
    print(
        "running workers take it up at their next heartbeat; "
        f"'{c.name}' still means its default version (atomq calculators default {c.name})"
    )
    return 0


def cmd_calculators_retire(args: argparse.Namespace) -> int:
    with _client(args) as client:
        c = client.retire_calculator(args.ref, new_default=args.new_default)
    print(f"retired {c.ref}: new jobs are refused; its {c.jobs_run} jobs keep their records")
    if args.new_default:
        print(f"'{c.name}' now means {c.name}@{args.new_default}")
    return 0


def cmd_calculators_default(args: argparse.Namespace) -> int:
    with _client(args) as client:
        if args.ref is None:
            for decision in client.default_history(args.name):
                who = decision.set_by or "atomq"
                print(f"{decision.set_at:%Y-%m-%d %H:%M} UTC  {decision.ref:<28} by {who}: "
                      f"{decision.reason}")  # fmt: skip
            return 0
        c = client.set_default_version(f"{args.name}@{args.ref}", reason=args.reason)
    print(f"'{c.name}' now means {c.ref}; jobs that name a version are unaffected")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="atomq", description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)

    def client_command(
        name: str, handler: Callable[[argparse.Namespace], int], help_text: str
    ) -> argparse.ArgumentParser:
        sub = commands.add_parser(name, help=help_text)
        sub.add_argument("--url", help="service URL (default: ATOMQ_URL or the client config)")
        sub.add_argument("--token", help="bearer token (default: ATOMQ_TOKEN or the config)")
        sub.set_defaults(handler=handler)
        return sub

    serve = commands.add_parser("serve", help="run API, broker and workers on this machine")
    _add_server_options(serve)
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8765)
    serve.add_argument("--workers", type=int, default=2, help="worker processes (CPU cores)")
    serve.set_defaults(handler=cmd_serve)

    worker = commands.add_parser("worker", help="run a worker that joins a service")
    _add_server_options(worker)
    worker.add_argument(
        "--concurrency",
        type=int,
        default=2,
        help="jobs run at once (processes); each keeps its own loaded models, so an ML "
        "worker usually wants fewer",
    )
    worker.add_argument(
        "--calculators",
        action="append",
        default=[],
        metavar="NAME[@VERSION],...",
        help="serve only these calculators (repeatable); run one worker per group to give "
        "each its own concurrency, e.g. ML models with --concurrency 1",
    )
    worker.add_argument("--loglevel", default="INFO")
    worker.set_defaults(handler=cmd_worker)

    demo = commands.add_parser("demo", help="start the embedded service and run a demo study")
    _add_server_options(demo)
    demo.add_argument("--port", type=int, default=8766)
    demo.set_defaults(handler=cmd_demo)

    verify = commands.add_parser(
        "verify", help="recompute every artifact's sha256 and report mismatches (server)"
    )
    _add_server_options(verify)
    verify.set_defaults(handler=cmd_verify)

    db = commands.add_parser("db", help="the database's schema revision and backups (admin)")
    db_commands = db.add_subparsers(dest="db_command", required=True)
    for name, help_text in (
        ("current", "the database's revision and this atomq's newest (exit 1 if they differ)"),
        ("history", "every schema revision this atomq knows, oldest first"),
        (
            "upgrade",
            "upgrade to this atomq's newest revision, in one transaction (SQLite: "
            "after a backup in <data dir>/backups)",
        ),
        ("backup", "a consistent copy (SQLite: VACUUM INTO; PostgreSQL: pg_dump)"),
    ):
        sub = db_commands.add_parser(name, help=help_text)
        _add_server_options(sub)
        if name == "backup":
            sub.add_argument("path", help="a new file for the copy")
        sub.set_defaults(handler=cmd_db)

    users = commands.add_parser("users", help="manage users (on the server machine)")
    users_commands = users.add_subparsers(dest="users_command", required=True)
    users_add = users_commands.add_parser("add", help="create a user and print a new token")
    _add_server_options(users_add)
    users_add.add_argument("name")
    users_add.add_argument("--admin", action="store_true", help="give the admin role")
    users_add.set_defaults(handler=cmd_users_add)

    submit = client_command("submit", cmd_submit, "submit every structure in a file")
    submit.add_argument("file", help="any format ase.io.read understands")
    submit.add_argument("--task", choices=["single_point", "relax", "md"], default="single_point")
    submit.add_argument("--calculator", required=True, help="'name' or 'name@version'")
    submit.add_argument("--optimizer", choices=["BFGS", "LBFGS", "FIRE"], default="BFGS")
    submit.add_argument("--fmax", type=float, default=0.05, help="eV/Angstrom")
    submit.add_argument("--max-steps", type=int, default=500)
    submit.add_argument("--relax-cell", action="store_true", help="relax the cell as well")
    submit.add_argument("--pressure", type=float, default=0.0, help="eV/Angstrom^3")
    submit.add_argument("--ensemble", choices=["nve", "nvt", "npt"], default="nvt")
    submit.add_argument("--thermostat", choices=["langevin", "bussi", "nose_hoover_chain"])
    submit.add_argument("--temperature", type=float, help="K")
    submit.add_argument("--timestep", type=float, default=2.0, help="fs")
    submit.add_argument("--steps", type=int, default=1000)
    submit.add_argument("--pressure-gpa", type=float, default=0.0, help="npt pressure, GPa")
    submit.add_argument("--seed", type=int, help="drawn by the service if absent")
    submit.add_argument("--frame-interval", type=int, default=10, help="steps between frames")
    submit.add_argument("--tag", action="append", default=[])
    submit.add_argument("--wait", action="store_true", help="wait, showing progress")
    submit.add_argument("--fresh", action="store_true", help=FRESH_HELP)
    submit.add_argument(
        "--batch",
        action="store_true",
        help="send every structure of the file in one request, as one batch",
    )

    neb = client_command("submit-neb", cmd_submit_neb, "a nudged elastic band between two ends")
    neb.add_argument("initial", help="a structure file, or the id of a finished job")
    neb.add_argument("final", help="a structure file, or the id of a finished job")
    neb.add_argument("--calculator", required=True)
    neb.add_argument("--images", type=int, default=5, help="intermediate images")
    neb.add_argument("--climb", action="store_true", help="climbing image")
    neb.add_argument("--interpolation", choices=["linear", "idpp"], default="idpp")
    neb.add_argument("--fmax", type=float, default=0.05, help="eV/Angstrom")
    neb.add_argument("--max-steps", type=int, default=500)
    neb.add_argument("--tag", action="append", default=[])
    neb.add_argument("--wait", action="store_true", help="wait, showing progress")
    neb.add_argument("--fresh", action="store_true", help=FRESH_HELP)

    jobs = client_command("jobs", cmd_jobs, "list jobs, newest first")
    jobs.add_argument("--state")
    jobs.add_argument("--owner")
    jobs.add_argument("--calculator")
    jobs.add_argument("--kind")
    jobs.add_argument("--tag")
    jobs.add_argument("--weights-sha256", help="calculator versions with these weights")
    jobs.add_argument(
        "--package",
        metavar="NAME[==VERSION]",
        help="jobs whose result was computed with this package, e.g. sevenn or ase==3.23.0",
    )
    jobs.add_argument(
        "--since",
        type=utc_time,
        help="created at or after this ISO 8601 date or time; without a zone it is UTC",
    )
    jobs.add_argument(
        "--until",
        type=utc_time,
        help="created before this ISO 8601 date or time; without a zone it is UTC",
    )
    jobs.add_argument("--limit", type=int, default=50)

    show = client_command("show", cmd_show, "a job with its result summary and provenance")
    show.add_argument("id", type=int)

    fetch = client_command("fetch", cmd_fetch, "write a job's final structure and results")
    fetch.add_argument("id", type=int)
    fetch.add_argument("-o", "--output", required=True, help="e.g. out.extxyz")
    fetch.add_argument("--timeout", type=float, default=None, help="seconds to wait")
    fetch.add_argument(
        "--artifact", help="download this file instead (e.g. trajectory.extxyz, thermo.csv)"
    )

    cancel = client_command("cancel", cmd_cancel, "cancel a job")
    cancel.add_argument("id", type=int)

    compare = client_command(
        "compare", cmd_compare, "rerun finished jobs with another calculator and compare"
    )
    chosen = compare.add_mutually_exclusive_group(required=True)
    chosen.add_argument("--tag", help="compare every job with this tag")
    chosen.add_argument("--job", type=int, action="append", help="a job id (repeat it)")
    chosen.add_argument("--id", type=int, help="show an existing comparison instead")
    compare.add_argument("--calculator", help="the candidate: 'name' or 'name@version'")
    compare.add_argument("--baseline-calculator", help="only jobs run with this calculator")
    compare.add_argument("--wait", action="store_true", help="wait for every candidate job")
    compare.add_argument("--timeout", type=float, default=None, help="seconds to wait")
    compare.add_argument("--csv", help="also write the rows to this CSV file")
    compare.add_argument(
        "--fresh", action="store_true", help="compute again even if identical results exist"
    )

    calculators = client_command(
        "calculators", cmd_calculators, "list calculator versions, or show/add/retire one"
    )
    calculator_commands = calculators.add_subparsers(dest="calculator_command")
    show = calculator_commands.add_parser("show", help="one version in full")
    show.add_argument("ref", help="name@version")
    add = calculator_commands.add_parser("add", help="admin: register a new version")
    add.add_argument("ref", help="name@version of the new record (records never change)")
    add.add_argument("--backend", required=True, help="installed backend entry point")
    add.add_argument("--parameters", default="{}", help="fixed parameters as JSON")
    add.add_argument(
        "--elements", action="append", required=True, help="elements covered, e.g. Cu,Ni,Al"
    )
    add.add_argument("--weights", help="weights file, on a folder the workers share")
    add.add_argument("--sha256", help="refuse registration unless the file has this sha256")
    add.add_argument("--notes", default="", help="free text: source, training set, caveats")
    retire = calculator_commands.add_parser("retire", help="admin: refuse new jobs for it")
    retire.add_argument("ref", help="name@version")
    retire.add_argument(
        "--new-default", metavar="VERSION", help="needed when retiring the name's default version"
    )
    default = calculator_commands.add_parser(
        "default", help="the decisions of what a bare name means; admin: set a new one"
    )
    default.add_argument("name", help="a calculator name, e.g. emt")
    default.add_argument("ref", nargs="?", metavar="VERSION", help="admin: make this the default")
    default.add_argument("--reason", default="", help="recorded with the decision")
    for sub, handler in (
        (show, cmd_calculators_show),
        (add, cmd_calculators_add),
        (retire, cmd_calculators_retire),
        (default, cmd_calculators_default),
    ):
        sub.add_argument("--url", help=argparse.SUPPRESS)
        sub.add_argument("--token", help=argparse.SUPPRESS)
        sub.set_defaults(handler=handler)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handler: Callable[[argparse.Namespace], int] = args.handler
    try:
        return handler(args)
    except AtomqError as exc:
        print(f"atomq: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
