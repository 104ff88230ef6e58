"""Admin routes: users, tokens, calculator versions. Members may only read themselves."""

from __future__ import annotations

from importlib.metadata import entry_points

from fastapi import APIRouter
from sqlmodel import Session, col, select

from atomq.admin import (
    CalculatorCreate,
    CalculatorRetire,
    DefaultVersionPublic,
    DefaultVersionSet,
    TokenCreate,
    TokenIssued,
    TokenPublic,
    UserCreate,
    UserPublic,
)
from atomq.jobs import CalculatorPublic
from atomq_service import registry
from atomq_service.api.deps import (
    ERROR_RESPONSES,
    CurrentAdmin,
    CurrentUser,
    Label,
    SessionDep,
    TokenId,
    UserName,
)
from atomq_service.errors import ApiError
from atomq_service.models import ApiToken, User, utcnow
from atomq_service.users import hash_token, new_token

router = APIRouter(prefix="/v1", responses=ERROR_RESPONSES, tags=["admin"])

BACKEND_GROUP = "atomq.calculators"


@router.get("/me")
def who_am_i(user: CurrentUser) -> UserPublic:
    return UserPublic.model_validate(user, from_attributes=True)


@router.get("/users")
def list_users(_admin: CurrentAdmin, session: SessionDep) -> list[UserPublic]:
    users = session.exec(select(User).order_by(col(User.name))).all()
    return [UserPublic.model_validate(u, from_attributes=True) for u in users]


@router.post("/users", status_code=201)
def create_user(body: UserCreate, _admin: CurrentAdmin, session: SessionDep) -> TokenIssued:
    if session.exec(select(User).where(User.name == body.name)).first() is not None:
        raise ApiError(409, "user_exists", f"user {body.name!r} exists; issue a token instead")
    user = User(name=body.name, role=body.role)
    session.add(user)
    session.flush()
    issued = _issue(session, user, TokenCreate())
    session.commit()
    return issued


@router.post("/users/{name}/tokens", status_code=201)
def issue_token(
    name: UserName, body: TokenCreate, _admin: CurrentAdmin, session: SessionDep
) -> TokenIssued:
    issued = _issue(session, _user(session, name), body)
    session.commit()
    return issued


@router.get("/users/{name}/tokens")
def list_tokens(name: UserName, _admin: CurrentAdmin, session: SessionDep) -> list[TokenPublic]:
    user = _user(session, name)
    tokens = session.exec(select(ApiToken).where(ApiToken.user_id == user.id)).all()
    return [_token_public(t, user) for t in tokens]


@router.post("/tokens/{token_id}/revoke")
def revoke_token(token_id: TokenId, _admin: CurrentAdmin, session: SessionDep) -> TokenPublic:
    token = session.get(ApiToken, token_id)
    if token is None:
        raise ApiError(404, "token_not_found", f"no token with id {token_id}")
    token.revoked = True
    session.add(token)
    user = session.get(User, token.user_id)
    assert user is not None
    public = _token_public(token, user)
    session.commit()
    return public


@router.post("/calculators", status_code=201, tags=["calculators"])
def register_calculator(
    body: CalculatorCreate, _admin: CurrentAdmin, session: SessionDep
) -> CalculatorPublic:
    # Only installed backends can be named; nothing a client sends chooses code to import.
    installed = sorted(e.name for e in entry_points(group=BACKEND_GROUP))
    if body.backend not in installed:
        raise ApiError(
            422,
            "unknown_backend",
            f"no backend {body.backend!r} is installed on the service; "
            f"installed: {', '.join(installed)}",
        )
    record = body.model_dump(exclude={"weights_sha256"})
    if body.weights_path is not None:
        record["weights_sha256"], record["weights_size"] = registry.weights_identity(
            body.weights_path, body.weights_sha256
        )
    elif body.weights_sha256 is not None:
        raise ApiError(
            422,
            "weights_sha256_without_file",
            "weights_sha256 was given without weights_path; give the file's path too",
        )
    calculator = registry.register(session, **record)
    public = registry.to_public(session, [calculator])[0]
    session.commit()
    return public


@router.post("/calculators/{name}/{version}/retire", tags=["calculators"])
def retire_calculator(
    name: Label,
    version: Label,
    admin: CurrentAdmin,
    session: SessionDep,
    body: CalculatorRetire | None = None,
) -> CalculatorPublic:
    calculator = registry.find(session, name, version)
    registry.retire(session, calculator, admin, body.new_default if body else None)
    public = registry.to_public(session, [calculator])[0]
    session.commit()
    return public


@router.put("/defaults/{name}", tags=["calculators"])
def set_default_version(
    name: Label, body: DefaultVersionSet, admin: CurrentAdmin, session: SessionDep
) -> CalculatorPublic:
    """What a bare `name` means from now on; the decision is recorded with who made it."""
    calculator = registry.set_default(session, name, body.version, admin, body.reason)
    public = registry.to_public(session, [calculator])[0]
    session.commit()
    return public


@router.get("/defaults/{name}", tags=["calculators"])
def default_version_history(
    name: Label, _user: CurrentUser, session: SessionDep
) -> list[DefaultVersionPublic]:
    """Every decision of what a bare `name` meant, oldest first."""
    return registry.default_history(session, name)


def _user(session: Session, name: str) -> User:
    user = session.exec(select(User).where(User.name == name)).first()
    if user is None:
        raise ApiError(404, "user_not_found", f"no user {name!r}")
    return user


def _issue(session: Session, user: User, body: TokenCreate) -> TokenIssued:
    if body.expires_at is not None and body.expires_at <= utcnow():
        raise ApiError(422, "expiry_in_past", "expires_at is in the past; give a future time")
    secret = new_token()
    assert user.id is not None
    token = ApiToken(user_id=user.id, token_sha256=hash_token(secret), expires_at=body.expires_at)
    session.add(token)
    session.flush()
    return TokenIssued(**_token_public(token, user).model_dump(), token=secret)


def _token_public(token: ApiToken, user: User) -> TokenPublic:
    assert token.id is not None
    return TokenPublic(
        id=token.id,
        user=user.name,
        created_at=token.created_at,
        expires_at=token.expires_at,
        revoked=token.revoked,
    )
