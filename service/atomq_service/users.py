"""Users and their bearer tokens (stored as sha256, shown once)."""

from __future__ import annotations

import hashlib
import secrets
from datetime import datetime

from sqlalchemy import Engine
from sqlmodel import Session, select

from atomq_service.db import transaction
from atomq_service.models import ApiToken, User

ROLES = ("member", "admin")


def hash_token(token: str) -> str:
    # Tokens are 256 random bits, so a plain sha256 cannot be reversed by guessing.
    return hashlib.sha256(token.encode()).hexdigest()


def new_token() -> str:
    return "atq_" + secrets.token_urlsafe(32)


def add_user(engine: Engine, name: str, role: str = "member") -> str:
    """Create the user (if new) and a fresh token for it; returns the plaintext token."""
    if role not in ROLES:
        raise ValueError(f"unknown role {role!r}; use one of {', '.join(ROLES)}")
    name = name.strip()
    if not name or len(name) > 64:
        raise ValueError("user name must be 1 to 64 characters")
    with transaction(engine) as session:
        user = session.exec(select(User).where(User.name == name)).first()
        if user is None:
            user = User(name=name, role=role)
            session.add(user)
            session.flush()
        return _issue_token(session, user)


def issue_token(engine: Engine, name: str, expires_at: datetime | None = None) -> str:
    with transaction(engine) as session:
        user = session.exec(select(User).where(User.name == name)).one()
        return _issue_token(session, user, expires_at)


def _issue_token(session: Session, user: User, expires_at: datetime | None = None) -> str:
    assert user.id is not None
    token = new_token()
    session.add(ApiToken(user_id=user.id, token_sha256=hash_token(token), expires_at=expires_at))
    return token
