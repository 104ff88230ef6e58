"""Errors the client raises; each carries the service's own message."""

from __future__ import annotations


class AtomqError(Exception):
    """Base class of every error raised by the atomq client."""


class ServerError(AtomqError):
    """The service answered with an error status."""

    def __init__(self, status_code: int, message: str, code: str | None = None) -> None:
        super().__init__(f"{status_code}: {message}")
        self.status_code = status_code
        self.message = message
        self.code = code


class InvalidRequest(ServerError):
    """The service refused the input (4xx other than auth and not-found)."""


class AuthenticationFailed(ServerError):
    """Missing, unknown or expired token (401), or not allowed (403)."""


class NotFound(ServerError):
    """No such job, result or calculator (404)."""


class JobFailed(AtomqError):
    """The job ended failed or cancelled, so it has no result."""

    def __init__(self, job_id: int, state: str, error: str | None) -> None:
        super().__init__(f"job {job_id} ended {state}: {error or 'no reason recorded'}")
        self.job_id = job_id
        self.state = state
        self.error = error


class ConfigurationError(AtomqError):
    """The client does not know which service to talk to or with which token."""
