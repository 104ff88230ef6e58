"""The database's schema revision: create, check, upgrade, back up.

Every schema change is an Alembic revision in migrations/versions/. A new, empty database
is created from the models and stamped at the newest revision (Alembic's own recipe for
a fresh database; a test proves the models and the revisions agree). Any other database
must be at the newest revision before a service or worker uses it:

- the embedded default (SQLite in the data directory) is upgraded by `atomq serve`
  itself, after it wrote a consistent backup copy beside it;
- a lab database is upgraded by an admin (`atomq db backup`, then `atomq db upgrade`);
  everything else refuses to start against it and names those commands.

A database made before revisions existed (atomq up to commit 780447e, no version table)
is recognised by its tables: stamped at the baseline when they are the baseline's,
refused otherwise, with the differences named, before anything is written to it.
"""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import lru_cache
from pathlib import Path
from typing import Any

from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import (
    Connection,
    DateTime,
    Engine,
    String,
    create_engine,
    insert,
    inspect,
    make_url,
    text,
)
from sqlmodel import SQLModel
from sqlmodel.sql.sqltypes import AutoString

from atomq_service import models  # noqa: F401  (registers the tables)
from atomq_service.models import Deployment, UTCDateTime, utcnow
from atomq_service.settings import Settings, hide_password

MIGRATIONS_DIR = Path(__file__).parent / "migrations"
BASELINE = "0001"  # the schema of atomq at commit 780447e, the last one without revisions
VERSION_TABLE = "alembic_version"


class SchemaError(RuntimeError):
    """The database is not at the revision this atomq needs; the message says what to do."""


def _config(connection: Connection | None = None) -> Config:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["connection"] = connection
    return config


@lru_cache
def _scripts() -> ScriptDirectory:
    return ScriptDirectory.from_config(_config())


def head() -> str:
    """The newest revision this code knows."""
    revision = _scripts().get_current_head()
    assert revision is not None
    return revision


def history() -> list[tuple[str, str]]:
    """(revision, what it changes), oldest first."""
    return [(s.revision, s.doc or "") for s in reversed(list(_scripts().walk_revisions()))]


@dataclass(frozen=True)
class SchemaState:
    revision: str | None  # None: no version table
    tables: frozenset[str]

    @property
    def empty(self) -> bool:
        return not self.tables

    def describe(self) -> str:
        if self.empty:
            return "empty"
        if self.revision is None:
            return "from before schema revisions (no version table)"
        return f"at revision {self.revision}"


def read_state(connection: Connection) -> SchemaState:
    tables = frozenset(inspect(connection).get_table_names()) - {VERSION_TABLE}
    revision = MigrationContext.configure(connection).get_current_revision()
    return SchemaState(revision, tables)


def current(engine: Engine) -> SchemaState:
    with engine.connect() as connection:
        return read_state(connection)


def _locked(connection: Connection) -> None:
    """One process at a time creates or upgrades (API and workers start together). SQLite:
    the transaction began IMMEDIATE, which already excludes other writers."""
    if connection.dialect.name == "postgresql":
        connection.execute(text("SELECT pg_advisory_xact_lock(hashtext('atomq schema'))"))


def prepare_schema(
    engine: Engine,
    settings: Settings | None = None,
    *,
    auto_upgrade: bool = False,
    announce: Callable[[str], None] = print,
) -> None:
    """Make the database ready for this code, or refuse with what to run.

    Empty: created at the newest revision. At the newest revision: used as it is. Older,
    with auto_upgrade (`atomq serve` on its embedded default): backed up beside itself,
    then upgraded. Anything else raises SchemaError naming the commands to run."""
    with engine.begin() as connection:
        _locked(connection)
        state = read_state(connection)
        if state.empty:
            _create(connection)
            return
        if state.revision == head():
            return
    where = _command_options(settings, engine)
    if state.revision is not None and state.revision not in _known():
        raise SchemaError(
            f"the database ({where}) is at revision {state.revision}, which this atomq "
            f"does not know (its newest is {head()}): a newer atomq upgraded it. Run that "
            "version of atomq; the database is unchanged"
        )
    if not auto_upgrade or settings is None:
        embedded = settings is not None and settings.database_url is None
        also = " (or start `atomq serve`, which does both for its own database)"
        raise SchemaError(
            f"the database ({where}) is {state.describe()}; this atomq needs revision "
            f"{head()}. Back it up and upgrade it, then start again{also if embedded else ''}:"
            f"\n  atomq db backup BACKUP_FILE {where}\n  atomq db upgrade {where}"
        )
    saved = backup_beside(settings, state)
    announce(f"atomq: database backed up to {saved} (it opens as the database was)")
    before, after = upgrade(engine)
    announce(f"atomq: database upgraded from {before} to revision {after}")


def _create(connection: Connection) -> None:
    """A new database at the newest revision, with the rows the revisions would have
    written (its identity)."""
    SQLModel.metadata.create_all(connection)
    MigrationContext.configure(connection).stamp(_scripts(), "head")
    connection.execute(
        insert(Deployment).values(id=1, identity=str(uuid.uuid4()), created_at=utcnow())
    )


def backup_beside(settings: Settings, state: SchemaState) -> Path:
    """A backup of the embedded default in <data dir>/backups, named by its revision."""
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    name = f"atomq-{state.revision or 'unversioned'}-{stamp}.db"
    return backup(settings.resolved_database_url, settings.data_dir / "backups" / name)


def _command_options(settings: Settings | None, engine: Engine) -> str:
    """The command-line options that name this database, for messages."""
    if settings is not None and settings.database_url is None:
        return f"--data-dir {settings.data_dir}"
    url = settings.database_url if settings is not None else None
    return f"--database {hide_password(url or engine.url.render_as_string())}"


@lru_cache
def _known() -> frozenset[str]:
    return frozenset(revision for revision, _ in history())


def upgrade(engine: Engine) -> tuple[str, str]:
    """Upgrade to the newest revision in one transaction (a failure changes nothing).
    Returns (what it was, the revision it is now)."""
    with engine.begin() as connection:
        _locked(connection)
        state = read_state(connection)
        if state.empty:
            _create(connection)
            return "empty", head()
        if state.revision is None:
            differences = differences_from_baseline(connection)
            if differences:
                raise SchemaError(
                    "this database was made before schema revisions by an atomq whose "
                    "tables differ from the first revision's (atomq at commit 780447e), so "
                    "it cannot be upgraded automatically: " + "; ".join(differences) + ". "
                    "Nothing was changed"
                )
            MigrationContext.configure(connection).stamp(_scripts(), BASELINE)
        if state.revision is not None and state.revision not in _known():
            raise SchemaError(
                f"the database is at revision {state.revision}, which this atomq does not "
                f"know (its newest is {head()}); run the newer atomq that upgraded it"
            )
        command.upgrade(_config(connection), "head")
        return state.describe(), head()


def _layout(connection: Connection) -> dict[str, tuple[frozenset[str], frozenset[str]]]:
    """Each table's column names and index names."""
    inspector = inspect(connection)
    return {
        table: (
            frozenset(c["name"] for c in inspector.get_columns(table)),
            frozenset(str(i["name"]) for i in inspector.get_indexes(table)),
        )
        for table in inspector.get_table_names()
        if table != VERSION_TABLE
    }


@lru_cache
def _baseline_layout() -> dict[str, tuple[frozenset[str], frozenset[str]]]:
    """The tables the baseline revision makes, built in a scratch in-memory database."""
    scratch = create_engine("sqlite://")
    with scratch.begin() as connection:
        command.upgrade(_config(connection), BASELINE)
        return _layout(connection)


def differences_from_baseline(connection: Connection) -> list[str]:
    """What differs between this database's tables and the baseline's, in words."""
    found, expected = _layout(connection), _baseline_layout()
    problems = [f"table {t} is missing" for t in sorted(expected.keys() - found.keys())]
    problems += [f"table {t} is not atomq's" for t in sorted(found.keys() - expected.keys())]
    for table in sorted(expected.keys() & found.keys()):
        (columns, indexes), (want_columns, want_indexes) = found[table], expected[table]
        problems += [f"{table} lacks column {c}" for c in sorted(want_columns - columns)]
        problems += [f"{table} has an unknown column {c}" for c in sorted(columns - want_columns)]
        problems += [f"{table} lacks index {i}" for i in sorted(want_indexes - indexes)]
    return problems


def backup(database_url: str, path: Path) -> Path:
    """A consistent copy while the service may be running. SQLite: VACUUM INTO (one
    self-contained file, never a plain copy of a database in WAL mode); PostgreSQL:
    pg_dump's custom format (restore with pg_restore)."""
    url = make_url(database_url)
    if path.exists():
        raise SchemaError(f"{path} exists; give a new file name for the backup")
    path.parent.mkdir(parents=True, exist_ok=True)
    if url.get_backend_name() == "sqlite":
        if not url.database or url.database == ":memory:":
            raise SchemaError("an in-memory SQLite database has nothing to back up")
        source = Path(url.database)
        if not source.exists():
            raise SchemaError(f"no SQLite database at {source}")
        connection = sqlite3.connect(source)
        try:
            connection.execute("VACUUM INTO ?", (str(path),))
        finally:
            connection.close()
        return path
    if url.get_backend_name() == "postgresql":
        pg_dump = shutil.which("pg_dump")
        libpq_url = url.set(drivername="postgresql").render_as_string(hide_password=False)
        if pg_dump is None:
            raise SchemaError(
                "pg_dump is not on PATH; install PostgreSQL's client tools (Debian: "
                "postgresql-client) or run on the database server: "
                f"pg_dump --format=custom --file {path} {hide_password(libpq_url)}"
            )
        done = subprocess.run(
            [pg_dump, "--format=custom", "--file", str(path), libpq_url],
            capture_output=True,
            text=True,
        )
        if done.returncode != 0:
            path.unlink(missing_ok=True)
            raise SchemaError(f"pg_dump failed: {done.stderr.strip()}")
        return path
    raise SchemaError(f"backups of {url.get_backend_name()} databases are not supported")


def compare_type(
    _context: Any, _column: Any, reflected: Any, model: Any, _metadata_type: Any
) -> bool | None:
    """SQLite reflects DateTime(timezone=True) as DATETIME and SQLModel's AutoString as
    VARCHAR: the same storage, not a difference."""
    if isinstance(model, UTCDateTime) and isinstance(reflected, DateTime):
        return False
    if isinstance(model, AutoString) and isinstance(reflected, String):
        return False
    return None  # Alembic's own comparison


def model_differences(connection: Connection) -> list[Any]:
    """What Alembic's autogenerate would write to turn this database into the models
    (empty when the revisions and the models agree)."""
    context = MigrationContext.configure(
        connection, opts={"compare_type": compare_type, "compare_server_default": True}
    )
    return list(compare_metadata(context, SQLModel.metadata))


def write_revision(message: str, revision_id: str) -> None:
    """For developers: write the next revision with Alembic's autogenerate, comparing the
    models with a scratch database built by the existing revisions. Read and tidy what it
    writes (data migrations are never guessed)."""
    scratch = create_engine("sqlite://")
    with scratch.begin() as connection:
        command.upgrade(_config(connection), "head")
        command.revision(
            _config(connection), message=message, autogenerate=True, rev_id=revision_id
        )
