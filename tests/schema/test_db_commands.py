"""`atomq db current / history / upgrade / backup`, run as the command an admin types.
Backups are checked by restoring them with the databases' own tools (sqlite3, pg_restore)."""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import uuid
from pathlib import Path

import pytest
from sqlalchemy import text

from atomq_service.db import make_engine
from atomq_service.schema import head, prepare_schema
from atomq_service.users import add_user
from tests.conftest import unavailable

FIXTURE = Path(__file__).parents[1] / "fixtures" / "pre_migration"


def atomq(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "atomq.cli", *args], capture_output=True, text=True, timeout=120
    )


def test_current_upgrade_and_history_on_an_old_data_dir(tmp_path: Path) -> None:
    shutil.copy(FIXTURE / "atomq.db", tmp_path / "atomq.db")
    before = atomq("db", "current", "--data-dir", str(tmp_path))
    assert before.returncode == 1 and "from before schema revisions" in before.stdout
    refused = atomq("users", "add", "late-member", "--data-dir", str(tmp_path))
    assert refused.returncode != 0 and "atomq db upgrade --data-dir" in refused.stderr
    upgraded = atomq("db", "upgrade", "--data-dir", str(tmp_path))
    assert upgraded.returncode == 0, upgraded.stderr
    assert "backed up to" in upgraded.stdout and f"revision {head()}" in upgraded.stdout
    after = atomq("db", "current", "--data-dir", str(tmp_path))
    assert after.returncode == 0 and f"at revision {head()}" in after.stdout
    history = atomq("db", "history")
    assert history.stdout.splitlines()[0].startswith("0001")
    assert f"{head()} (newest)" in history.stdout
    added = atomq("users", "add", "late-member", "--data-dir", str(tmp_path))
    assert added.returncode == 0, added.stderr


def test_an_absent_database_is_named_not_created(tmp_path: Path) -> None:
    answer = atomq("db", "upgrade", "--data-dir", str(tmp_path / "nowhere"))
    assert answer.returncode != 0 and "no database in" in answer.stderr
    assert not (tmp_path / "nowhere" / "atomq.db").exists()


def test_sqlite_backup_opens_as_the_database(tmp_path: Path) -> None:
    shutil.copy(FIXTURE / "atomq.db", tmp_path / "atomq.db")
    target = tmp_path / "copies" / "monday.db"
    done = atomq("db", "backup", str(target), "--data-dir", str(tmp_path))
    assert done.returncode == 0, done.stderr
    query = "SELECT id, input_hash, state FROM job ORDER BY id"
    with sqlite3.connect(tmp_path / "atomq.db") as source, sqlite3.connect(target) as copy:
        assert copy.execute(query).fetchall() == source.execute(query).fetchall()
        assert copy.execute("PRAGMA integrity_check").fetchone() == ("ok",)
    again = atomq("db", "backup", str(target), "--data-dir", str(tmp_path))
    assert again.returncode != 0 and "exists" in again.stderr  # never overwritten


@pytest.mark.postgres
def test_postgres_backup_restores_with_pg_restore(postgres_url: str, tmp_path: Path) -> None:
    import psycopg

    if shutil.which("pg_dump") is None or shutil.which("pg_restore") is None:
        unavailable("PostgreSQL's client tools (pg_dump, pg_restore) are not on PATH")
    admin = postgres_url.replace("postgresql+psycopg://", "postgresql://")
    names = [f"atomq_backup_{uuid.uuid4().hex[:10]}" for _ in range(2)]
    with psycopg.connect(admin, autocommit=True) as connection:
        for name in names:
            connection.execute(f'CREATE DATABASE "{name}"')
    base = postgres_url.rsplit("/", 1)[0]
    source_url, restored_url = (f"{base}/{name}" for name in names)
    try:
        engine = make_engine(source_url)
        prepare_schema(engine)
        add_user(engine, "keeper-of-records", role="admin")
        target = tmp_path / "lab.dump"
        done = atomq("db", "backup", str(target), "--database", source_url)
        assert done.returncode == 0, done.stderr
        restore = subprocess.run(
            ["pg_restore", "--no-owner", "--dbname",
             restored_url.replace("postgresql+psycopg://", "postgresql://"), str(target)],
            capture_output=True, text=True, timeout=120,
        )  # fmt: skip
        assert restore.returncode == 0, restore.stderr
        restored = make_engine(restored_url)
        with restored.connect() as connection:
            assert connection.execute(text('SELECT name FROM "user"')).scalars().all() == [
                "keeper-of-records"
            ]
        current = atomq("db", "current", "--database", restored_url)
        assert current.returncode == 0 and f"at revision {head()}" in current.stdout
        restored.dispose()
        engine.dispose()
    finally:
        with psycopg.connect(admin, autocommit=True) as connection:
            for name in names:
                connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
