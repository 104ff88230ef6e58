"""Typed dependencies shared by the routes."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Annotated, Any

from fastapi import Depends, Header, Path, Query, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from pydantic import BaseModel
from sqlmodel import Session, select

from atomq_service.errors import ApiError
from atomq_service.messaging import Dispatcher
from atomq_service.models import ApiToken, User
from atomq_service.settings import Settings
from atomq_service.users import hash_token

_bearer = HTTPBearer(auto_error=False, description="A token printed by `atomq users add NAME`.")


def get_session(request: Request) -> Iterator[Session]:
    """One session per request; routes that write commit explicitly, anything else rolls
    back. It closes when the route function returns, before the response is sent: on
    SQLite an open transaction holds the write lock, and a streamed response (events, an
    artifact download) would otherwise hold it for as long as the stream lasts."""
    with Session(request.app.state.engine, expire_on_commit=False) as session:
        yield session


def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def get_dispatcher(request: Request) -> Dispatcher:
    dispatcher: Dispatcher = request.app.state.dispatcher
    return dispatcher


SessionDep = Annotated[Session, Depends(get_session, scope="function")]
SettingsDep = Annotated[Settings, Depends(get_settings)]
DispatcherDep = Annotated[Dispatcher, Depends(get_dispatcher)]


def current_user(
    session: SessionDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> User:
    if credentials is None:
        raise ApiError(
            401,
            "missing_token",
            "missing bearer token: send 'Authorization: Bearer <token>' "
            "(`atomq users add NAME` prints one)",
        )
    found = session.exec(
        select(ApiToken, User)
        .join(User, User.id == ApiToken.user_id)  # type: ignore[arg-type]
        .where(ApiToken.token_sha256 == hash_token(credentials.credentials))
    ).first()
    if found is None:
        raise ApiError(401, "invalid_token", "unknown token; ask an admin for a new one")
    token, user = found
    if token.revoked:
        raise ApiError(401, "revoked_token", "this token was revoked; ask an admin for a new one")
    if token.expires_at is not None and token.expires_at <= datetime.now(UTC):
        raise ApiError(401, "expired_token", "this token has expired; ask an admin for a new one")
    return user


CurrentUser = Annotated[User, Depends(current_user)]


def current_admin(user: CurrentUser) -> User:
    if user.role != "admin":
        raise ApiError(403, "admin_only", f"only admins may do this; {user.name} is a member")
    return user


CurrentAdmin = Annotated[User, Depends(current_admin)]


# Ids are database integers: anything past a 32-bit column (PostgreSQL's INTEGER) cannot
# exist, so it is refused by validation rather than reaching the database.
MAX_ID = 2**31 - 1
JobId = Annotated[int, Path(ge=1, le=MAX_ID, description="A job's id.")]
ArtifactId = Annotated[int, Path(ge=1, le=MAX_ID, description="An artifact's id.")]
TokenId = Annotated[int, Path(ge=1, le=MAX_ID, description="A token's id.")]
# Names and labels: printable text without control characters (PostgreSQL refuses NUL).
NAME_PATTERN = r"^[A-Za-z0-9_.@+-]{1,128}$"
# A client's key for one submission: a retry with the same key gets the same record back.
IdempotencyKey = Annotated[
    str | None,
    Header(
        pattern=r"^[\x21-\x7e]{1,128}$",  # visible ASCII
        description="Retries with the same key return what the first try created.",
    ),
]
UserName = Annotated[str, Path(pattern=r"^[A-Za-z0-9_.@-]{1,64}$")]
Label = Annotated[str, Path(pattern=r"^[A-Za-z0-9_.-]{1,64}$")]


class ErrorBody(BaseModel):
    """Every refusal: what was wrong and how to fix it, and a short code."""

    detail: str
    code: str


ERROR_RESPONSES: dict[int | str, dict[str, Any]] = {
    status: {"model": ErrorBody, "description": description}
    for status, description in {
        400: "A body that is not JSON",
        401: "Missing, unknown, revoked or expired token",
        403: "Not allowed for this user",
        404: "No such job, artifact or calculator",
        409: "The job's state does not allow this",
        410: "A recorded artifact whose file is gone",
        413: "Request body too large",
        422: "Invalid input, with what was wrong",
        429: "Too many requests or queued jobs",
    }.items()
}
# How long a waiting route (/wait, /result?wait_s=) may hold a request before it answers.
WaitSeconds = Annotated[
    float, Query(ge=0, le=60, description="Longest wait in seconds; then it answers.")
]
