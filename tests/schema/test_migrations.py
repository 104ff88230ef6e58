"""Schema revisions. The outside reference is the committed fixture: a database written by
atomq at commit 780447e (before revisions existed; tests/fixtures/pre_migration, made by
the script beside it), upgraded here on SQLite and, loaded into the baseline revision, on
PostgreSQL; and Alembic's own autogenerate, which must find nothing between the models
and a database built by the revisions alone."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path
from typing import Any

import pytest
from alembic import command
from ase.build import bulk
from fastapi.testclient import TestClient
from pydantic import TypeAdapter
from sqlalchemy import Engine, MetaData, inspect, select, text
from sqlmodel import SQLModel

from atomq import MD, Relax, SinglePoint, Structure
from atomq.results import Provenance, Result
from atomq_service.app import create_app
from atomq_service.db import make_engine
from atomq_service.schema import (
    SchemaError,
    _config,
    current,
    head,
    model_differences,
    prepare_schema,
    upgrade,
)
from atomq_service.settings import Settings
from atomq_service.users import add_user

FIXTURE = Path(__file__).parents[1] / "fixtures" / "pre_migration"
# What the fixture's script submitted first (tests/fixtures/pre_migration/make_fixture.py).
CU = bulk("Cu", "fcc", a=3.62, cubic=True)


@pytest.fixture
def old_sqlite(tmp_path: Path) -> Path:
    """A copy of the fixture as the embedded default of a data directory."""
    data_dir = tmp_path / "data"
    data_dir.mkdir()
    shutil.copy(FIXTURE / "atomq.db", data_dir / "atomq.db")
    return data_dir


def raw_rows(path: Path) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, as SQLite stores it (text, integers, floats)."""
    with sqlite3.connect(path) as connection:
        tables = [
            name
            for (name,) in connection.execute(
                "SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name"
            )
            if name != "alembic_version"
        ]
        old_columns = {
            table: [row[1] for row in connection.execute(f'PRAGMA table_info("{table}")')]
            for table in tables
        }
        return {
            table: connection.execute(
                f'SELECT {", ".join(old_columns[table])} FROM "{table}" ORDER BY rowid'
            ).fetchall()
            for table in tables
        }


def typed_rows(engine: Engine, columns: dict[str, list[str]]) -> dict[str, list[dict[str, Any]]]:
    """The given columns of every table, read through the models' types (timestamps,
    JSON), ordered by primary key: comparable across SQLite and PostgreSQL."""
    found: dict[str, list[dict[str, Any]]] = {}
    with engine.connect() as connection:
        for table in SQLModel.metadata.sorted_tables:
            if table.name not in columns:
                continue
            chosen = [table.c[name] for name in columns[table.name]]
            query = select(*chosen).order_by(*table.primary_key.columns)
            found[table.name] = [dict(row._mapping) for row in connection.execute(query)]
    return found


def fixture_columns() -> dict[str, list[str]]:
    with sqlite3.connect(FIXTURE / "atomq.db") as connection:
        tables = [
            name
            for (name,) in connection.execute("SELECT name FROM sqlite_master WHERE type='table'")
        ]
        return {
            table: [row[1] for row in connection.execute(f'PRAGMA table_info("{table}")')]
            for table in tables
        }


def reuse_of_old_jobs(engine: Engine, settings: Settings) -> dict[str, int | None]:
    """Submit again what the fixture's script submitted first; which old job each reuses."""
    requests = {
        "single_point": SinglePoint(),
        "relax": Relax(fmax=0.02),
        "md": MD(
            ensemble="nvt", thermostat="langevin", temperature_K=300, timestep_fs=2,
            steps=40, seed=11, frame_interval=10, thermo_interval=10,
        ),
    }  # fmt: skip
    structures = {"single_point": CU, "relax": CU, "md": CU.repeat(2)}
    reused: dict[str, int | None] = {}
    with TestClient(create_app(settings)) as http:
        token = add_user(engine, "reviewer-after-upgrade", role="admin")
        for kind, task in requests.items():
            body = {
                "structure": Structure.from_atoms(structures[kind]).model_dump(mode="json"),
                "task": task.model_dump(mode="json"),
                "calculator": "emt@1",
            }
            answer = http.post("/v1/jobs", json=body, headers={"Authorization": f"Bearer {token}"})
            assert answer.status_code == 201, answer.text
            assert answer.json()["state"] == "succeeded", answer.json()
            reused[kind] = answer.json()["reused_from"]
    return reused


# -- the models and the revisions agree -----------------------------------------------
def _revisions_only(engine: Engine) -> None:
    """Build the schema by running every revision from nothing (not create_all)."""
    with engine.begin() as connection:
        command.upgrade(_config(connection), "head")


def test_revisions_build_what_the_models_describe_sqlite(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'fresh.db'}")
    _revisions_only(engine)
    with engine.connect() as connection:
        assert model_differences(connection) == []
    assert current(engine).revision == head()


@pytest.mark.postgres
def test_revisions_build_what_the_models_describe_postgres(fresh_postgres: str) -> None:
    engine = make_engine(fresh_postgres)
    _revisions_only(engine)
    with engine.connect() as connection:
        assert model_differences(connection) == []
    engine.dispose()


def test_the_check_finds_a_difference_when_there_is_one(tmp_path: Path) -> None:
    """The agreement above can fail: drop an index the models declare and it is found."""
    engine = make_engine(f"sqlite:///{tmp_path / 'fresh.db'}")
    _revisions_only(engine)
    with engine.begin() as connection:
        connection.execute(text("DROP INDEX ix_job_owner_state"))
        differences = model_differences(connection)
    assert any("ix_job_owner_state" in str(d) for d in differences), differences


# -- upgrading the database written by the code before revisions ------------------------
def test_embedded_default_upgrades_after_a_backup_and_keeps_every_row(old_sqlite: Path) -> None:
    database = old_sqlite / "atomq.db"
    before = raw_rows(database)
    settings = Settings(data_dir=old_sqlite, broker_url="memory://")
    engine = make_engine(settings.resolved_database_url)
    told: list[str] = []
    prepare_schema(engine, settings, auto_upgrade=True, announce=told.append)
    assert current(engine).revision == head()
    assert any("backed up" in line for line in told) and any("upgraded" in line for line in told)

    # Every row of every table identical, field by field, as stored.
    after = raw_rows(database)
    assert after.keys() == before.keys() | {"defaultversion", "deployment"}  # added since
    for table, rows in before.items():
        columns = fixture_columns()[table]
        with sqlite3.connect(database) as connection:
            kept = connection.execute(
                f'SELECT {", ".join(columns)} FROM "{table}" ORDER BY rowid'
            ).fetchall()
        assert kept == rows, table
    # The one new column: the old jobs' hashes were made by hash version 1.
    with sqlite3.connect(database) as connection:
        versions = {v for (v,) in connection.execute("SELECT hash_version FROM job")}
    assert versions == {1}
    # A bare name means after the upgrade what it meant before: then, the active version
    # registered last (the rule of the code at 780447e, applied to the fixture in SQL).
    with sqlite3.connect(FIXTURE / "atomq.db") as original:
        meant = dict(
            original.execute("SELECT name, max(id) FROM calculator WHERE NOT retired GROUP BY name")
        )
    with sqlite3.connect(database) as connection:
        defaults = dict(
            connection.execute(
                "SELECT name, calculator_id FROM defaultversion d WHERE id = "
                "(SELECT max(id) FROM defaultversion WHERE name = d.name)"
            )
        )
    assert defaults == meant

    # Results and provenance still parse and compare equal to what was stored.
    with sqlite3.connect(FIXTURE / "atomq.db") as original, sqlite3.connect(database) as new:
        query = "SELECT job_id, result, provenance FROM jobresult ORDER BY job_id"
        for (job, result, provenance), (job2, result2, provenance2) in zip(
            original.execute(query), new.execute(query), strict=True
        ):
            assert job == job2
            results = TypeAdapter(Result)
            assert results.validate_json(result) == results.validate_json(result2)
            assert Provenance.model_validate_json(provenance) == Provenance.model_validate_json(
                provenance2
            )

    # The backup opens as the old database: no version table, the same rows.
    (backup,) = (old_sqlite / "backups").iterdir()
    assert raw_rows(backup) == before
    with sqlite3.connect(backup) as connection:
        tables = {n for (n,) in connection.execute("SELECT name FROM sqlite_master")}
    assert "alembic_version" not in tables

    # And the old jobs are still found by reuse.
    assert reuse_of_old_jobs(engine, settings) == {"single_point": 1, "relax": 2, "md": 3}
    engine.dispose()


@pytest.mark.postgres
def test_the_same_fixture_upgrades_on_postgres(fresh_postgres: str, tmp_path: Path) -> None:
    """The fixture's rows loaded into PostgreSQL at the baseline, the version table then
    removed (as the code before revisions left a database), upgraded by `atomq db upgrade`'s
    function: every row identical, old jobs reused."""
    columns = {t: c for t, c in fixture_columns().items() if t in SQLModel.metadata.tables}
    old = make_engine(f"sqlite:///{shutil.copy(FIXTURE / 'atomq.db', tmp_path / 'old.db')}")
    before = typed_rows(old, columns)
    old.dispose()

    engine = make_engine(fresh_postgres)
    with engine.begin() as connection:
        command.upgrade(_config(connection), "0001")
        baseline = MetaData()
        baseline.reflect(connection)
        for table in SQLModel.metadata.sorted_tables:
            if table.name not in baseline.tables:
                continue  # added by a later revision
            if before.get(table.name):
                connection.execute(baseline.tables[table.name].insert(), before[table.name])
            if "id" in baseline.tables[table.name].c:
                connection.execute(
                    text(
                        f"SELECT setval(pg_get_serial_sequence('\"{table.name}\"', 'id'), "
                        f'COALESCE((SELECT max(id) FROM "{table.name}"), 0) + 1, false)'
                    )
                )
        connection.execute(text("DROP TABLE alembic_version"))
    assert current(engine).revision is None and not current(engine).empty

    settings = Settings(database_url=fresh_postgres, broker_url="memory://")
    with pytest.raises(SchemaError, match="atomq db upgrade --database"):
        prepare_schema(engine, settings)  # a lab database is never upgraded behind an admin
    upgrade(engine)
    assert current(engine).revision == head()
    assert typed_rows(engine, columns) == before
    with engine.connect() as connection:
        versions = set(connection.execute(text("SELECT DISTINCT hash_version FROM job")).scalars())
    assert versions == {1}
    assert reuse_of_old_jobs(engine, settings) == {"single_point": 1, "relax": 2, "md": 3}
    engine.dispose()


# -- refusals ----------------------------------------------------------------------------
def test_a_lab_database_at_another_revision_is_refused_with_the_command(old_sqlite: Path) -> None:
    url = f"sqlite:///{old_sqlite / 'atomq.db'}"
    engine = make_engine(url)
    before = raw_rows(old_sqlite / "atomq.db")
    with pytest.raises(SchemaError) as refused:
        prepare_schema(engine, Settings(database_url=url, broker_url="memory://"))
    message = str(refused.value)
    assert f"atomq db upgrade --database {url}" in message
    assert f"atomq db backup BACKUP_FILE --database {url}" in message
    assert raw_rows(old_sqlite / "atomq.db") == before  # nothing written, no table added
    engine.dispose()


def test_the_api_refuses_to_start_on_an_old_database(old_sqlite: Path) -> None:
    url = f"sqlite:///{old_sqlite / 'atomq.db'}"
    app = create_app(Settings(database_url=url, broker_url="memory://"))
    with pytest.raises(SchemaError, match="this atomq needs revision"), TestClient(app):
        pass


def test_a_database_from_a_newer_atomq_is_refused(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'newer.db'}")
    prepare_schema(engine)
    with engine.begin() as connection:
        connection.execute(text("UPDATE alembic_version SET version_num = '9999'"))
    with pytest.raises(SchemaError, match="newer atomq"):
        prepare_schema(engine, Settings(data_dir=tmp_path), auto_upgrade=True)
    engine.dispose()


def test_an_unrecognised_old_database_is_refused_naming_the_differences(
    old_sqlite: Path,
) -> None:
    """A database from before the baseline whose tables are not the baseline's (here the
    comparison tables are missing, as in an atomq older than comparisons)."""
    database = old_sqlite / "atomq.db"
    with sqlite3.connect(database) as connection:
        connection.execute("DROP TABLE comparisonitem")
        connection.execute("ALTER TABLE job DROP COLUMN request_sha256")
    before = raw_rows(database)
    engine = make_engine(f"sqlite:///{database}")
    with pytest.raises(SchemaError) as refused:
        upgrade(engine)
    assert "table comparisonitem is missing" in str(refused.value)
    assert "job lacks column request_sha256" in str(refused.value)
    assert raw_rows(database) == before
    assert current(engine).revision is None
    engine.dispose()


def test_a_fresh_database_is_created_at_the_newest_revision(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'new.db'}")
    prepare_schema(engine)
    assert current(engine).revision == head()
    with engine.connect() as connection:
        assert model_differences(connection) == []
        assert set(inspect(connection).get_table_names()) >= set(SQLModel.metadata.tables)
    engine.dispose()
