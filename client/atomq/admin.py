"""Users, tokens and calculator registration on the wire (admin routes)."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, JsonValue

Role = Literal["member", "admin"]


class UserCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    name: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.@-]+$")
    role: Role = "member"


class UserPublic(BaseModel):
    name: str
    role: Role
    created_at: datetime


class TokenCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    expires_at: AwareDatetime | None = Field(
        default=None, description="With a time zone; none means no expiry."
    )


class TokenPublic(BaseModel):
    """A token's record; the secret itself is never shown again."""

    id: int
    user: str
    created_at: datetime
    expires_at: datetime | None
    revoked: bool


class TokenIssued(TokenPublic):
    token: str = Field(description="Shown once; store it now.")


class CalculatorCreate(BaseModel):
    """A new immutable calculator version; `backend` must be an installed entry point."""

    model_config = ConfigDict(extra="forbid")
    name: str = Field(min_length=1, max_length=64, pattern=r"^[a-z0-9][a-z0-9_.-]*$")
    version: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.-]+$")
    backend: str = Field(min_length=1, max_length=64)
    parameters: dict[str, JsonValue] = Field(default_factory=dict)
    elements: list[str] = Field(min_length=1)
    notes: str = Field(default="", max_length=4000, pattern=r"^[^\x00]*$")
    weights_path: str | None = Field(
        default=None,
        max_length=4096,
        pattern=r"^/[^\x00]*$",
        description="Absolute path of the weights file, the same on the service and every "
        "worker (a shared folder); the service records its sha256 and size.",
    )
    weights_sha256: str | None = Field(
        default=None,
        pattern=r"^[0-9a-f]{64}$",
        description="Optional: the sha256 you expect; registration is refused if the file differs.",
    )


class DefaultVersionSet(BaseModel):
    """An admin's decision: a bare calculator name now means this version."""

    model_config = ConfigDict(extra="forbid")
    version: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.-]+$")
    reason: str = Field(default="", max_length=4000, pattern=r"^[^\x00]*$")


class CalculatorRetire(BaseModel):
    """Retire a version; retiring a name's default names the new default too."""

    model_config = ConfigDict(extra="forbid")
    new_default: str | None = Field(
        default=None, min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.-]+$"
    )


class DefaultVersionPublic(BaseModel):
    """One recorded decision of what a bare name means."""

    name: str
    version: str
    ref: str
    set_by: str | None = Field(description="The admin; none where atomq set it itself.")
    reason: str
    set_at: datetime
