"""The notebook-facing client: submit jobs, watch them, fetch results as ASE objects."""

from __future__ import annotations

import gzip
import hashlib
import sys
import tempfile
import time
import uuid
import warnings
from collections.abc import Iterator, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any, Literal, TextIO, overload

import ase.io
import httpx
from ase import Atoms
from ase.calculators.singlepoint import SinglePointCalculator
from pydantic import TypeAdapter

from atomq import config
from atomq.admin import CalculatorCreate, CalculatorRetire, DefaultVersionPublic, DefaultVersionSet
from atomq.batches import BatchCreate, BatchItem, BatchPublic, BatchResults
from atomq.bulk import collector_paused
from atomq.comparisons import Comparison, ComparisonCreate, ComparisonPublic
from atomq.errors import (
    AtomqError,
    AuthenticationFailed,
    InvalidRequest,
    JobFailed,
    NotFound,
    ServerError,
)
from atomq.jobs import CalculatorPublic, JobCreate, JobPage, JobPublic, JobState, WorkerPublic
from atomq.results import ArtifactRecord, Provenance, Result
from atomq.structure import Structure
from atomq.tasks import MD, Relax, SinglePoint, Task

_result_adapter: TypeAdapter[Result] = TypeAdapter(Result)


class Client:
    """A connection to one atomq service. Use as a context manager or call close()."""

    def __init__(
        self,
        url: str | None = None,
        token: str | None = None,
        *,
        timeout: float = 30.0,
        retry_for_s: float = 60.0,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        """`retry_for_s`: how long to keep retrying when the service cannot be reached (a
        restart); submissions carry an idempotency key, so a retry never submits twice."""
        self.url, token = config.resolve(url, token)
        self.retry_for_s = retry_for_s
        self._http = httpx.Client(
            base_url=self.url,
            headers={"Authorization": f"Bearer {token}"},
            timeout=timeout,
            transport=transport,
        )

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._http.close()

    def __repr__(self) -> str:
        return f"Client({self.url!r})"

    # -- requests -------------------------------------------------------------
    def request(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        """Send one request, retrying while the service cannot be reached; raise a typed
        error carrying the server's message. Every atomq request is safe to repeat: reads
        and cancels by nature, submissions through their idempotency key."""
        deadline = time.monotonic() + self.retry_for_s
        pause = 0.1
        while True:
            try:
                response = self._http.request(method, path, **kwargs)
                break
            except httpx.TransportError:
                if time.monotonic() + pause > deadline:
                    raise
                time.sleep(pause)
                pause = min(pause * 2, 2.0)
        if response.status_code >= 400:
            raise _error_from(response)
        return response

    # -- jobs -----------------------------------------------------------------
    def submit(
        self,
        atoms: Atoms | Structure | None,
        task: Task,
        *,
        calculator: str,
        tags: list[str] | None = None,
        time_limit_s: float | None = None,
        reuse: bool = True,
    ) -> Job:
        """Queue one calculation; returns at once with a Job handle.

        For NEB pass atoms=None: the endpoints are part of the task. If a job with the same
        input hash already succeeded, the new job is answered at once with a copy of its
        result (`info().reused_from` names it); reuse=False computes it again.
        """
        structure = (
            atoms if atoms is None or isinstance(atoms, Structure) else Structure.from_atoms(atoms)
        )
        body = JobCreate(
            structure=structure,
            task=task,
            calculator=calculator,
            tags=tags or [],
            time_limit_s=time_limit_s,
            reuse=reuse,
        )
        response = self.request("POST", "/v1/jobs", **json_body(body.model_dump_json()))
        info = JobPublic.model_validate_json(response.content)
        if info.waiting_reason is not None:  # queued, but no live worker can run it now
            warnings.warn(
                f"job {info.id} ({info.calculator}) waits: {info.waiting_reason}", stacklevel=2
            )
        return Job(self, info.id, info)

    def submit_batch(
        self,
        structures: Sequence[Atoms | Structure],
        task: SinglePoint | Relax | MD,
        *,
        calculator: str,
        tags: list[str] | None = None,
        time_limit_s: float | None = None,
        reuse: bool = True,
    ) -> Batch:
        """Queue many structures with one task and calculator in one request (up to
        20 000); returns at once with a Batch handle. Each structure becomes a job of its
        own; results come back in the order given."""
        with collector_paused():
            body = BatchCreate(
                structures=[
                    s if isinstance(s, Structure) else Structure.from_atoms(s) for s in structures
                ],
                task=task,
                calculator=calculator,
                tags=tags or [],
                time_limit_s=time_limit_s,
                reuse=reuse,
            )
            text = body.model_dump_json()
        response = self.request("POST", "/v1/batches", **json_body(text))
        info = BatchPublic.model_validate_json(response.content)
        return Batch(self, info.id, info)

    def batch(self, batch_id: int) -> Batch:
        """A handle to an existing batch."""
        return Batch(self, batch_id)

    def job(self, job_id: int) -> Job:
        """A handle to an existing job."""
        return Job(self, job_id)

    def jobs(
        self,
        *,
        state: JobState | str | None = None,
        owner: str | None = None,
        calculator: str | None = None,
        kind: str | None = None,
        tag: str | None = None,
        weights_sha256: str | None = None,
        package: str | None = None,
        package_version: str | None = None,
        created_after: datetime | None = None,
        created_before: datetime | None = None,
        offset: int = 0,
        limit: int = 100,
    ) -> JobPage:
        """List jobs, newest first, matching every given filter.

        `package` (a distribution name, any version) with an optional exact
        `package_version` finds jobs whose result was computed with it;
        `created_after` <= created < `created_before` take timezone-aware datetimes.
        """
        params: dict[str, str | int] = {"offset": offset, "limit": limit}
        for key, value in (
            ("state", state),
            ("owner", owner),
            ("calculator", calculator),
            ("kind", kind),
            ("tag", tag),
            ("weights_sha256", weights_sha256),
            ("package", package),
            ("package_version", package_version),
            ("created_after", created_after),
            ("created_before", created_before),
        ):
            if isinstance(value, datetime):
                params[key] = value.isoformat()
            elif value is not None:
                params[key] = str(value)
        response = self.request("GET", "/v1/jobs", params=params)
        return JobPage.model_validate_json(response.content)

    def prov_json(self, tag: str) -> dict[str, Any]:
        """Every finished job with this tag as one W3C PROV-JSON document."""
        document: dict[str, Any] = self.request("GET", "/v1/prov-json", params={"tag": tag}).json()
        return document

    # -- comparisons (model-swap reports) -----------------------------------------
    def compare(
        self,
        calculator: str,
        *,
        tag: str | None = None,
        job_ids: list[int] | None = None,
        baseline_calculator: str | None = None,
        tags: list[str] | None = None,
        time_limit_s: float | None = None,
        reuse: bool = True,
    ) -> Comparison:
        """Rerun finished jobs (by `tag` or `job_ids`, optionally only those run with
        `baseline_calculator`) under `calculator`, as one batch; returns at once with a
        handle whose report() / wait() / dataframe() give the per-job deltas. reuse=False
        computes every rerun again even where an identical finished job exists."""
        body = ComparisonCreate(
            tag=tag,
            job_ids=job_ids,
            baseline_calculator=baseline_calculator,
            calculator=calculator,
            tags=tags or [],
            time_limit_s=time_limit_s,
            reuse=reuse,
        )
        response = self.request(
            "POST",
            "/v1/comparisons",
            content=body.model_dump_json(),
            headers={"Content-Type": "application/json", "Idempotency-Key": uuid.uuid4().hex},
        )
        report = ComparisonPublic.model_validate_json(response.content)
        return Comparison(self, report.id, report)

    def comparison(self, comparison_id: int) -> Comparison:
        """A handle to an existing comparison, with its current report."""
        response = self.request("GET", f"/v1/comparisons/{comparison_id}")
        report = ComparisonPublic.model_validate_json(response.content)
        return Comparison(self, comparison_id, report)

    def calculators(self) -> list[CalculatorPublic]:
        """Every registered version, with job counts and the live workers that run it."""
        response = self.request("GET", "/v1/calculators")
        return [CalculatorPublic.model_validate(item) for item in response.json()]

    def calculator(self, ref: str) -> CalculatorPublic:
        """One version, 'name@version'."""
        name, version = _split_ref(ref)
        response = self.request("GET", f"/v1/calculators/{name}/{version}")
        return CalculatorPublic.model_validate_json(response.content)

    def workers(self) -> list[WorkerPublic]:
        """Live workers and the calculator versions each can (and cannot) run."""
        response = self.request("GET", "/v1/workers")
        return [WorkerPublic.model_validate(item) for item in response.json()]

    def register_calculator(self, record: CalculatorCreate) -> CalculatorPublic:
        """Admin: add a new immutable version (a weights path is hashed by the service)."""
        response = self.request("POST", "/v1/calculators", json=record.model_dump(mode="json"))
        return CalculatorPublic.model_validate_json(response.content)

    def retire_calculator(self, ref: str, new_default: str | None = None) -> CalculatorPublic:
        """Admin: refuse new jobs for this version; its records and results stay. Retiring
        a name's default version needs `new_default`, the version the name means next."""
        name, version = _split_ref(ref)
        body = CalculatorRetire(new_default=new_default)
        response = self.request(
            "POST", f"/v1/calculators/{name}/{version}/retire", json=body.model_dump()
        )
        return CalculatorPublic.model_validate_json(response.content)

    def set_default_version(self, ref: str, reason: str = "") -> CalculatorPublic:
        """Admin: a bare name ('emt') means this version ('emt@2') from now on. Recorded
        with who and when; registering a version never changes the default."""
        name, version = _split_ref(ref)
        body = DefaultVersionSet(version=version, reason=reason)
        response = self.request("PUT", f"/v1/defaults/{name}", json=body.model_dump())
        return CalculatorPublic.model_validate_json(response.content)

    def default_history(self, name: str) -> list[DefaultVersionPublic]:
        """Every decision of what a bare calculator name meant, oldest first."""
        response = self.request("GET", f"/v1/defaults/{name}")
        return [DefaultVersionPublic.model_validate(item) for item in response.json()]


# Request bodies from this size on travel gzip-compressed (level 1: JSON numbers shrink
# to about a third in a few milliseconds per megabyte); smaller ones are not worth it.
GZIP_REQUEST_BYTES = 256 * 1024


def json_body(text: str) -> dict[str, Any]:
    """httpx arguments for a JSON submission: the body (compressed when large), its headers
    and a fresh idempotency key, so a retry after a lost answer is recognised."""
    content = text.encode()
    headers = {"Content-Type": "application/json", "Idempotency-Key": uuid.uuid4().hex}
    if len(content) >= GZIP_REQUEST_BYTES:
        content = gzip.compress(content, compresslevel=1)
        headers["Content-Encoding"] = "gzip"
    return {"content": content, "headers": headers}


def _ask_wait_route(
    client: Client, path: str, deadline: float | None, wait_param: str = "timeout_s"
) -> bytes:
    """One request to a route that waits: the service answers as soon as the work has
    ended, or after at most 30 s (or what is left before `deadline`), and we ask again."""
    left = 30.0 if deadline is None else max(deadline - time.monotonic(), 0.0)
    response = client.request(
        "GET",
        path,
        params={wait_param: min(left, 30.0)},
        timeout=min(left, 30.0) + 30.0,  # the server holds the request that long
    )
    return response.content


def result_atoms(result: Result) -> Atoms:
    """A result's final structure as ase.Atoms with a SinglePointCalculator holding its
    energy, forces and stress."""
    atoms = result.structure.to_atoms()
    atoms.calc = SinglePointCalculator(
        atoms,
        energy=result.energy,
        forces=result.forces,
        **({"stress": list(result.stress)} if result.stress is not None else {}),
    )
    return atoms


class Batch:
    """A handle to a batch: its progress, and all its results at once, in order."""

    def __init__(self, client: Client, batch_id: int, info: BatchPublic | None = None) -> None:
        self.client = client
        self.id = batch_id
        self._info = info

    def __repr__(self) -> str:
        info = self._info
        return f"Batch({self.id}, {info.size} jobs)" if info else f"Batch({self.id})"

    def info(self) -> BatchPublic:
        """The batch now, with its jobs counted by state."""
        response = self.client.request("GET", f"/v1/batches/{self.id}")
        self._info = BatchPublic.model_validate_json(response.content)
        return self._info

    progress = info

    def wait(
        self, timeout: float | None = None, *, poll_interval: float = 0.5, progress: bool = False
    ) -> BatchPublic:
        """Block until every job has finished; TimeoutError after `timeout` seconds.

        With progress=True a count of finished jobs is redrawn on stderr."""
        deadline = None if timeout is None else time.monotonic() + timeout
        if not progress:
            return self._wait_on_server(timeout, deadline)
        interval = min(poll_interval, 0.02)
        while True:
            info = self.info()
            if progress:
                done = info.size - info.counts.get("queued", 0) - info.counts.get("running", 0)
                sys.stderr.write(f"\rbatch {self.id}: {done}/{info.size} finished")
                sys.stderr.flush()
            if info.finished:
                if progress:
                    sys.stderr.write("\n")
                return info
            if deadline is not None and time.monotonic() >= deadline:
                raise TimeoutError(
                    f"batch {self.id} not finished after {timeout} s: {info.counts}; call "
                    "wait() again or raise the timeout"
                )
            time.sleep(interval)
            interval = min(interval * 2, poll_interval)

    def _wait_on_server(self, timeout: float | None, deadline: float | None) -> BatchPublic:
        """Wait through the service's /wait route: it answers as soon as the last job
        ends (or after at most 30 s, then we ask again)."""
        while True:
            answer = _ask_wait_route(self.client, f"/v1/batches/{self.id}/wait", deadline)
            info = BatchPublic.model_validate_json(answer)
            self._info = info
            if info.finished:
                return info
            if deadline is not None and time.monotonic() >= deadline:
                raise TimeoutError(
                    f"batch {self.id} not finished after {timeout} s: {info.counts}; call "
                    "wait() again or raise the timeout"
                )

    def items(self, timeout: float | None = None, page: int = 500) -> list[BatchItem]:
        """Every job's state, error and result (None unless it succeeded), in order."""
        self.wait(timeout)
        items: list[BatchItem] = []
        while True:
            response = self.client.request(
                "GET",
                f"/v1/batches/{self.id}/results",
                params={"offset": len(items), "limit": page},
            )
            chunk = BatchResults.model_validate_json(response.content)
            items.extend(chunk.items)
            if not chunk.items or len(items) >= chunk.total:
                return items

    def results(self, timeout: float | None = None) -> list[Result]:
        """The results in submission order; JobFailed names the first job that did not
        succeed (use items() to see every job's state)."""
        results = []
        for item in self.items(timeout):
            if item.result is None:
                raise JobFailed(item.job_id, item.state, item.error)
            results.append(item.result)
        return results

    def atoms(self, timeout: float | None = None) -> list[Atoms]:
        """Final structures as ase.Atoms with SinglePointCalculators, in submission order."""
        return [result_atoms(result) for result in self.results(timeout)]

    def jobs(self) -> list[Job]:
        """Handles to the batch's jobs, in submission order."""
        info = self._info or self.info()
        return [Job(self.client, job_id) for job_id in info.job_ids]

    def cancel(self) -> BatchPublic:
        """Queued jobs end at once, running ones at their next step."""
        response = self.client.request("POST", f"/v1/batches/{self.id}/cancel")
        self._info = BatchPublic.model_validate_json(response.content)
        return self._info


def _split_ref(ref: str) -> tuple[str, str]:
    name, _, version = ref.partition("@")
    if not name or not version:
        raise ValueError(f"{ref!r} is not a calculator version; write it as name@version")
    return name, version


class Job:
    """A handle to one job: few verbs, explicit timeouts, no hidden state beyond the last info."""

    def __init__(self, client: Client, job_id: int, info: JobPublic | None = None) -> None:
        self.client = client
        self.id = job_id
        self._info = info

    def __repr__(self) -> str:
        state = self._info.state.value if self._info else "?"
        return f"Job({self.id}, {state})"

    def info(self) -> JobPublic:
        """Fetch the job's current record."""
        response = self.client.request("GET", f"/v1/jobs/{self.id}")
        self._info = JobPublic.model_validate_json(response.content)
        return self._info

    def status(self) -> JobState:
        return self.info().state

    @property
    def calculator(self) -> str:
        """The exact name@version this job runs with, pinned at submission (a bare name
        means its default version at that moment)."""
        return (self._info or self.info()).calculator

    def wait(
        self,
        timeout: float | None = None,
        *,
        poll_interval: float = 0.2,
        progress: bool = False,
        stream: TextIO | None = None,
    ) -> JobPublic:
        """Block until the job finishes; TimeoutError if it has not after `timeout` seconds.

        With progress=True a one-line bar (step, energy, fmax) is redrawn on stderr.
        """
        deadline = None if timeout is None else time.monotonic() + timeout
        if not progress:
            return self._wait_on_server(timeout, deadline)
        out = stream or sys.stderr
        interval = min(poll_interval, 0.005)  # start fast: small jobs finish in milliseconds
        while True:
            info = self.info()
            if progress:
                out.write("\r" + _progress_line(info))
                out.flush()
            if info.state.finished:
                if progress:
                    out.write("\n")
                return info
            if deadline is not None and time.monotonic() >= deadline:
                raise TimeoutError(
                    f"job {self.id} still {info.state.value} after {timeout} s; "
                    "call wait() again or raise the timeout"
                )
            time.sleep(interval)
            interval = min(interval * 2, poll_interval)

    def _wait_on_server(self, timeout: float | None, deadline: float | None) -> JobPublic:
        """Wait through the service's /wait route: it answers as soon as the job ends (or
        after at most 30 s, then we ask again), so no time is lost between polls."""
        while True:
            answer = _ask_wait_route(self.client, f"/v1/jobs/{self.id}/wait", deadline)
            info = JobPublic.model_validate_json(answer)
            self._info = info
            if info.state.finished:
                return info
            if deadline is not None and time.monotonic() >= deadline:
                raise TimeoutError(
                    f"job {self.id} still {info.state.value} after {timeout} s; "
                    "call wait() again or raise the timeout"
                )

    def result(self, timeout: float | None = None) -> Result:
        """Wait for the job and return its result; JobFailed if it failed or was cancelled."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            # The result route waits for the job itself: one request waits and fetches.
            try:
                answer = _ask_wait_route(
                    self.client, f"/v1/jobs/{self.id}/result", deadline, "wait_s"
                )
                break
            except InvalidRequest as error:
                if error.code != "no_result":
                    raise
            info = self.info()  # no result yet: failed, cancelled, or still to come
            if info.state.finished:
                raise JobFailed(self.id, info.state.value, info.error) from None
            if deadline is not None and time.monotonic() >= deadline:
                raise TimeoutError(
                    f"job {self.id} still {info.state.value} after {timeout} s; "
                    "call result() again or raise the timeout"
                )
        result = _result_adapter.validate_json(answer)
        if getattr(result, "converged", None) is False:
            warnings.warn(
                f"job {self.id} did NOT converge: it reached max_steps first", stacklevel=2
            )
        return result

    def atoms(self, timeout: float | None = None) -> Atoms:
        """The final structure as ase.Atoms with a SinglePointCalculator holding the results."""
        return result_atoms(self.result(timeout))

    def provenance(self, timeout: float | None = None) -> Provenance:
        """Who, with what code and which calculator version, produced the result."""
        self.wait(timeout)
        response = self.client.request("GET", f"/v1/jobs/{self.id}/provenance")
        return Provenance.model_validate_json(response.content)

    def follow(self) -> Iterator[JobPublic]:
        """Yield the job's record each time it changes, until it finishes (server-sent
        events: no polling from the client)."""
        with self.client._http.stream(
            "GET", f"/v1/jobs/{self.id}/events", timeout=None
        ) as response:
            if response.status_code >= 400:
                response.read()
                raise _error_from(response)
            event = None
            for line in response.iter_lines():
                if line.startswith("event:"):
                    event = line.split(":", 1)[1].strip()
                elif line.startswith("data:") and event == "job":
                    self._info = JobPublic.model_validate_json(line.split(":", 1)[1])
                    yield self._info
                elif line.startswith("data:") and event == "end":
                    return

    def artifacts(self) -> list[ArtifactRecord]:
        """Files the job wrote (trajectory, thermo log, NEB images), with size and sha256."""
        response = self.client.request("GET", f"/v1/jobs/{self.id}/artifacts")
        return [ArtifactRecord.model_validate(item) for item in response.json()]

    def download(self, name: str, path: str | Path) -> Path:
        """Stream one artifact to `path` and check its sha256 against the record."""
        record = next((a for a in self.artifacts() if a.name == name), None)
        if record is None:
            names = ", ".join(a.name for a in self.artifacts()) or "none"
            raise NotFound(404, f"job {self.id} has no artifact {name!r} (it has: {names})")
        path = Path(path)
        digest = hashlib.sha256()
        with self.client._http.stream("GET", f"/v1/artifacts/{record.id}") as response:
            if response.status_code >= 400:
                response.read()
                raise _error_from(response)
            with path.open("wb") as handle:
                for chunk in response.iter_bytes():
                    digest.update(chunk)
                    handle.write(chunk)
        if digest.hexdigest() != record.sha256:
            raise AtomqError(f"artifact {record.id} arrived with a different sha256 than recorded")
        return path

    @overload
    def trajectory(self, *, lazy: Literal[False] = False, name: str = ...) -> list[Atoms]: ...
    @overload
    def trajectory(self, *, lazy: Literal[True], name: str = ...) -> Iterator[Atoms]: ...

    def trajectory(
        self, *, lazy: bool = False, name: str = "trajectory.extxyz"
    ) -> list[Atoms] | Iterator[Atoms]:
        """The MD frames (or NEB images, name='images.extxyz') as ase.Atoms, each with a
        SinglePointCalculator. lazy=True streams the file to disk and yields frames one by
        one instead of holding them all."""
        if lazy:
            return self._iter_frames(name)
        return list(self._iter_frames(name))

    def _iter_frames(self, name: str) -> Iterator[Atoms]:
        with tempfile.TemporaryDirectory(prefix="atomq-") as scratch:
            path = self.download(name, Path(scratch) / name)
            yield from ase.io.iread(path, index=":", format="extxyz")

    def lineage(self) -> list[Provenance]:
        """Provenance of this result and of every result it was derived from (parents)."""
        response = self.client.request("GET", f"/v1/jobs/{self.id}/lineage")
        return [Provenance.model_validate(item) for item in response.json()]

    def prov_json(self) -> dict[str, Any]:
        """This job's lineage as a W3C PROV-JSON document."""
        document: dict[str, Any] = self.client.request(
            "GET", f"/v1/jobs/{self.id}/prov-json"
        ).json()
        return document

    def cancel(self) -> JobPublic:
        """Ask the service to stop the job; a running job stops at its next step."""
        response = self.client.request("POST", f"/v1/jobs/{self.id}/cancel")
        self._info = JobPublic.model_validate_json(response.content)
        return self._info


def _progress_line(info: JobPublic) -> str:
    if info.converged is False:
        return f"job {info.id} {info.state.value} but NOT CONVERGED (max_steps reached)"
    p = info.progress
    if p is None:
        return f"job {info.id} {info.state.value:<9}"
    width = 30
    done = int(width * min(p.step, p.total_steps) / max(p.total_steps, 1))
    bar = "#" * done + "." * (width - done)
    parts = [f"job {info.id} {info.state.value:<9} [{bar}] step {p.step}/{p.total_steps}"]
    if p.energy is not None:
        parts.append(f"E={p.energy:.6f} eV")
    if p.fmax is not None:
        parts.append(f"fmax={p.fmax:.4f} eV/A")
    if p.temperature_K is not None:
        parts.append(f"T={p.temperature_K:.1f} K")
    return " ".join(parts)


def _error_from(response: httpx.Response) -> ServerError:
    code: str | None = None
    try:
        body = response.json()
        message = str(body.get("detail", response.text))
        code = body.get("code")
    except ValueError:
        message = response.text or response.reason_phrase
    status = response.status_code
    if status in (401, 403):
        return AuthenticationFailed(status, message, code)
    if status == 404:
        return NotFound(status, message, code)
    if 400 <= status < 500:
        return InvalidRequest(status, message, code)
    return ServerError(status, message, code)
