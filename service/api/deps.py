"""Shared dependencies: the database, the settings, and who is calling (keys and roles)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from .. import store
from ..database import Database
from ..limits import Limits
from ..metrics import Metrics
from ..models import Role
from ..problems import Problem
from ..security import token_lookup, tokens_match
from ..settings import Settings

__all__ = [
    "Caller",
    "DatabaseDep",
    "SettingsDep",
    "MetricsDep",
    "authenticate",
    "authenticate_in",
    "require",
    "AnyCaller",
    "Reader",
    "Admin",
]


# Plain lookups are ``async`` so FastAPI calls them in place: a synchronous dependency would be
# sent to the thread pool, a thread hop per request.
async def get_database(request: Request) -> Database:
    return request.app.state.database


async def get_settings(request: Request) -> Settings:
    return request.app.state.settings


async def get_metrics(request: Request) -> Metrics:
    return request.app.state.metrics


DatabaseDep = Annotated[Database, Depends(get_database)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
MetricsDep = Annotated[Metrics, Depends(get_metrics)]


@dataclass(frozen=True)
class Caller:
    """The key a request was made with: its name (recorded as reviewer) and role."""

    name: str
    role: Role


_UNAUTHENTICATED = {"WWW-Authenticate": 'Bearer realm="heedful"'}


def authenticate(database: Database, authorization: str | None) -> Caller:
    """The caller behind an ``Authorization: Bearer`` header, or a 401 problem."""
    with database.read() as session:
        return authenticate_in(session, authorization)


def authenticate_in(session: Session, authorization: str | None) -> Caller:
    """:func:`authenticate` within the caller's transaction."""
    if not authorization:
        raise Problem(
            401, "Send an API key as 'Authorization: Bearer <token>'.", kind="unauthenticated",
            headers=_UNAUTHENTICATED,
        )
    scheme, _, token = authorization.partition(" ")
    token = token.strip()
    lookup = token_lookup(token) if scheme.lower() == "bearer" else None
    row = store.find_key(session, lookup) if lookup is not None else None
    # The hash comparison runs in constant time; unknown and revoked keys get the same answer.
    if row is None or not tokens_match(token, row.token_hash):
        raise Problem(
            401, "The API key is not valid or has been revoked.", kind="unauthenticated",
            headers=_UNAUTHENTICATED,
        )
    return Caller(name=row.name, role=Role(row.role))


def require(*roles: Role):
    """A dependency admitting only keys with one of ``roles`` (admin is always admitted)."""
    allowed = set(roles) | {Role.ADMIN}

    def dependency(request: Request, database: DatabaseDep) -> Caller:
        limits: Limits = request.app.state.limits
        address = request.client.host if request.client else None
        limits.check_address(address)
        try:
            caller = authenticate(database, request.headers.get("authorization"))
        except Problem as refused:
            if refused.status == 401:
                limits.failed(address)
            raise
        limits.admit(caller.name)
        if caller.role not in allowed:
            names = ", ".join(sorted(r.value for r in allowed))
            raise Problem(
                403,
                f"This key has the role {caller.role.value!r}; this operation needs one of: "
                f"{names}.",
                kind="forbidden",
            )
        return caller

    return dependency


Reader = Annotated[Caller, Depends(require(Role.ANALYST))]
Admin = Annotated[Caller, Depends(require(Role.ADMIN))]
AnyCaller = Annotated[Caller, Depends(require(Role.ANALYST, Role.INGEST))]
