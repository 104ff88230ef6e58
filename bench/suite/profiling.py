"""Where the time goes: a job's whole path (client, API route, worker) in one process,
sampled with pyinstrument, reduced to the top entries for the JSON.

One thread makes the path visible to one profiler: the API app runs on the calling
thread (an httpx transport over its own event loop, FastAPI's thread-pool hand-offs run
inline), the worker's code (`execute.run_job`) is called directly, and messages go to
kombu's in-memory broker (a Redis one would be shared with the running stack's workers).
What this misses is the hand-over between processes (publishing to Redis, the broker
delivering, the client's polling); the benchmarks' own timelines measure those.
"""

from __future__ import annotations

import asyncio
import time
from collections import defaultdict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import anyio.to_thread
import httpx
from fastapi import FastAPI

from atomq import Client
from atomq_service.app import create_app
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.settings import Settings
from atomq_service.users import add_user
from atomq_workers import execute

T = TypeVar("T")
OWN_PACKAGES = ("atomq/", "atomq_service/", "atomq_workers/")
TOP = 12


async def _inline(func: Callable[..., T], *args: Any, **_options: Any) -> T:
    return func(*args)


class SameThreadTransport(httpx.BaseTransport):
    """Runs the ASGI app on the calling thread, one event loop for all requests."""

    def __init__(self, app: FastAPI) -> None:
        self._asgi = httpx.ASGITransport(app=app)
        self._loop = asyncio.new_event_loop()

    def handle_request(self, request: httpx.Request) -> httpx.Response:
        async def call() -> httpx.Response:
            inner = httpx.Request(
                request.method, request.url, headers=request.headers, content=request.read()
            )
            response = await self._asgi.handle_async_request(inner)
            # As sent (a gzip body stays compressed): the outer client decodes it once.
            raw = b"".join([chunk async for chunk in response.aiter_raw()])
            return httpx.Response(response.status_code, headers=response.headers, content=raw)

        return self._loop.run_until_complete(call())

    def close(self) -> None:
        self._loop.close()


class InProcessService:
    """The API app and the worker's job runner in this process, over a SQLite file in
    `directory` or the given database."""

    def __init__(self, directory: Path, database_url: str | None = None) -> None:
        self.settings = Settings(
            data_dir=directory,
            database_url=database_url,
            broker_url="memory://",
            reconcile_interval_s=0,  # no background pass mixed into the profile
            requests_per_minute=0,
        )
        directory.mkdir(parents=True, exist_ok=True)
        self.app = create_app(self.settings)
        self.engine = self.app.state.engine
        self._run_sync = anyio.to_thread.run_sync

    def __enter__(self) -> InProcessService:
        # What the app's lifespan does, less the reconciler (turned off above).
        prepare_schema(self.engine)
        seed_defaults(self.engine)
        anyio.to_thread.run_sync = _inline  # type: ignore[assignment]
        token = add_user(self.engine, "bench-profiler", role="member")
        self.transport = SameThreadTransport(self.app)
        self.client = Client("http://testserver", token, transport=self.transport, timeout=600)
        return self

    def __exit__(self, *exc: object) -> None:
        self.client.close()
        self.transport.close()
        anyio.to_thread.run_sync = self._run_sync
        self.app.state.dispatcher.close()
        self.engine.dispose()

    def run_queued(self, job_id: int) -> str:
        """What a worker does with the job's message."""
        return execute.run_job(self.engine, job_id, self.settings).state


def available() -> bool:
    try:
        import pyinstrument  # noqa: F401
    except ImportError:
        return False
    return True


@contextmanager
def sampling(into: dict[str, Any], interval_s: float = 0.0005) -> Iterator[None]:
    """Profile the block; its top entries land in `into` (or why there are none)."""
    if not available():
        into["skipped"] = "pyinstrument is not installed (.venv/bin/pip install pyinstrument)"
        yield
        return
    from pyinstrument import Profiler

    profiler = Profiler(interval=interval_s)
    start = time.perf_counter()
    profiler.start()
    try:
        yield
    finally:
        session = profiler.stop()
        into.update(top_entries(session.root_frame(), time.perf_counter() - start))


def profile(call: Callable[[], T], into: dict[str, Any]) -> T:
    with sampling(into):
        return call()


def _where(frame: Any) -> str:
    return f"{frame.function} ({frame.file_path_short}:{frame.line_no})"


def top_entries(root: Any, wall_s: float) -> dict[str, Any]:
    """Self time per function (where the samples landed) and, for atomq's own functions,
    inclusive time (a recursive call counted once)."""
    own_time: dict[str, float] = defaultdict(float)
    inclusive: dict[str, float] = defaultdict(float)

    def walk(frame: Any, parent: str | None, stack: frozenset[str]) -> None:
        if frame.function == "[self]" or frame.is_synthetic_leaf:
            if parent is not None:
                own_time[parent] += frame.time
            return
        where = _where(frame)
        path = frame.file_path or ""
        if any(package in path for package in OWN_PACKAGES) and where not in stack:
            inclusive[where] += frame.time
        if not frame.children:
            own_time[where] += frame.time
        for child in frame.children:
            walk(child, where, stack | {where})

    if root is not None:
        walk(root, None, frozenset())
    total = sum(own_time.values()) or 1.0

    def ranked(table: dict[str, float]) -> list[dict[str, Any]]:
        best = sorted(table.items(), key=lambda item: -item[1])[:TOP]
        return [
            {"function": where, "seconds": round(s, 4), "share": round(s / total, 3)}
            for where, s in best
        ]

    return {
        "wall_s": round(wall_s, 3),
        "sampled_s": round(total, 3),
        "top_self_time": ranked(own_time),
        "top_atomq_inclusive": ranked(inclusive),
    }


def job_path(scratch: Path, structures: list[Any], what: str, warm: Any = None) -> dict[str, Any]:
    """Single points on `structures` along the whole path in one process: first timed per
    phase without the profiler, then again (as new jobs) under it. A first job on `warm`
    (default: the first structure) imports the calculator beforehand."""
    import statistics

    from atomq import SinglePoint

    found: dict[str, Any] = {
        "what": f"{len(structures)} x {what}: client, API route and worker code in one process"
    }
    directory = scratch / f"profile-{time.time_ns()}"
    with InProcessService(directory) as service:
        first = service.client.submit(
            structures[0] if warm is None else warm, SinglePoint(), calculator="emt"
        )
        service.run_queued(first.id)  # imports the calculator; neither timed nor profiled

        def one_pass(phases: dict[str, list[float]]) -> None:
            for atoms in structures:
                start = time.perf_counter()
                job = service.client.submit(atoms, SinglePoint(), calculator="emt", reuse=False)
                submitted = time.perf_counter()
                service.run_queued(job.id)
                ran = time.perf_counter()
                job.result()
                phases["submit"].append(submitted - start)
                phases["worker"].append(ran - submitted)
                phases["fetch"].append(time.perf_counter() - ran)

        phases: dict[str, list[float]] = {"submit": [], "worker": [], "fetch": []}
        one_pass(phases)
        found["median_ms_per_job_unprofiled"] = {
            name: round(statistics.median(values) * 1000, 2) for name, values in phases.items()
        }
        with sampling(found):
            one_pass({"submit": [], "worker": [], "fetch": []})
    return found


def batch_accept(scratch: Path, structures: list[Any]) -> dict[str, Any]:
    """client.submit_batch of `structures` (EMT single points), the client and the API
    route in one process, under the profiler."""
    from atomq import SinglePoint

    found: dict[str, Any] = {
        "what": f"client.submit_batch of {len(structures)} structures: client and API route "
        "in one process"
    }
    with InProcessService(scratch / f"profile-batch-{time.time_ns()}") as service:
        submit_batch = getattr(service.client, "submit_batch", None)
        if submit_batch is None:
            found["skipped"] = "the client has no submit_batch"
            return found
        submit_batch(structures[:2], SinglePoint(), calculator="emt")  # warms the route
        with sampling(found):
            submit_batch(structures, SinglePoint(), calculator="emt")
    return found
