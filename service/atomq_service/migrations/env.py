"""Alembic's environment for atomq. atomq_service.schema runs migrations on a connection
it opened itself (config.attributes["connection"]), inside one transaction, so a failed
migration leaves the database as it was."""

from __future__ import annotations

from typing import Any, Literal

from alembic import context
from sqlmodel import SQLModel
from sqlmodel.sql.sqltypes import AutoString

from atomq_service import models  # noqa: F401  (registers the tables)
from atomq_service.models import UTCDateTime
from atomq_service.schema import compare_type


def render_item(type_: str, obj: Any, autogen_context: Any) -> str | Literal[False]:
    """Revisions spell plain SQLAlchemy types, never atomq's own classes: a revision must
    read the same after the models module changes."""
    if type_ == "type" and isinstance(obj, UTCDateTime):
        return "sa.DateTime(timezone=True)"
    if type_ == "type" and isinstance(obj, AutoString):
        return "sa.String()" if obj.length is None else f"sa.String(length={obj.length})"
    return False


def run_migrations() -> None:
    connection = context.config.attributes["connection"]
    context.configure(
        connection=connection,
        target_metadata=SQLModel.metadata,
        render_as_batch=True,  # SQLite changes most columns by copying the table
        render_item=render_item,
        compare_type=compare_type,
    )
    with context.begin_transaction():
        context.run_migrations()


run_migrations()
