"""Submissions that carry an Idempotency-Key: every try with one key gets one answer.

A route looks the key up before recording. Two tries sent at once (a client's retry
while its first try is still being recorded) can both miss it; on PostgreSQL the second
insert then waits for the first to commit and fails on the table's (owner_id,
idempotency_key) unique constraint. That failure is the signal: roll back (nothing of
the losing try was committed or dispatched) and answer with the try that won, exactly as
a later retry would be answered. The happy path costs what it did: one lookup.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TypeVar

from sqlalchemy.exc import IntegrityError
from sqlmodel import Session

Answer = TypeVar("Answer")


def answer_once(
    session: Session,
    table: str,
    key: str | None,
    earlier: Callable[[str], Answer | None],
    record: Callable[[], Answer],
) -> Answer:
    """What a submission answers: what an earlier try with `key` created (`earlier` looks
    it up, refusing a key reused for another request), else what `record` records,
    commits and then dispatches. `table` names the table whose unique constraint guards
    the key."""
    if key is None:
        return record()
    found = earlier(key)
    if found is not None:
        return found
    try:
        return record()
    except IntegrityError as error:
        if not key_taken(error, table):
            raise
        session.rollback()
        # The constraint saw the winner's committed row, so a fresh statement sees it too.
        winner = earlier(key)
        if winner is None:
            raise
        return winner


def key_taken(error: IntegrityError, table: str) -> bool:
    """Whether the insert failed on the table's (owner_id, idempotency_key) unique
    constraint, rather than on anything else (which stays an error)."""
    diagnostics = getattr(error.orig, "diag", None)
    if diagnostics is not None:  # PostgreSQL (psycopg) names the violated constraint
        # PostgreSQL's own name for the unnamed UniqueConstraint of models.py.
        constraint: str | None = diagnostics.constraint_name
        return constraint == f"{table}_owner_id_idempotency_key_key"
    # SQLite names the columns instead.
    return f"UNIQUE constraint failed: {table}.owner_id, {table}.idempotency_key" in str(error.orig)
