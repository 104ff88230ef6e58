"""The notebook client needs none of the server's packages.

A child interpreter is started with an import hook that refuses fastapi, celery,
sqlmodel, sqlalchemy, redis, kombu and uvicorn; it imports atomq and submits a job
to the real service over HTTP.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

from atomq import JobState
from tests.stack.conftest import Stack

pytestmark = pytest.mark.stack

CHILD = textwrap.dedent(
    """
    import sys

    BLOCKED = {"fastapi", "celery", "sqlmodel", "sqlalchemy", "redis", "kombu", "uvicorn",
               "atomq_service", "atomq_workers"}

    class Refuse:
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in BLOCKED:
                raise ImportError(f"{name} is blocked in this test")
            return None

    sys.meta_path.insert(0, Refuse())
    try:
        import fastapi  # noqa: F401
    except ImportError:
        pass
    else:
        raise SystemExit("the import hook does not work")

    from ase.build import bulk
    import atomq

    with atomq.Client(sys.argv[1], sys.argv[2]) as client:
        job = client.submit(bulk("Cu"), atomq.SinglePoint(), calculator="emt")
    loaded = sorted(m for m in sys.modules if m.split(".")[0] in BLOCKED)
    print(job.id, ",".join(loaded))
    """
)


def test_client_imports_and_submits_without_server_packages(redis_stack: Stack) -> None:
    run = subprocess.run(
        [sys.executable, "-c", CHILD, redis_stack.url, redis_stack.token],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert run.returncode == 0, run.stderr
    job_id, loaded = run.stdout.split()[0], run.stdout.split()[1:]
    assert loaded == [], f"server modules were imported: {loaded}"
    with redis_stack.client() as client:
        assert client.job(int(job_id)).wait(60).state is JobState.succeeded
