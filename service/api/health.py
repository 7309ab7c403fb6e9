"""Liveness and readiness, without a key."""

from __future__ import annotations

from fastapi import APIRouter

from ..problems import Problem
from ..schemas import Health
from .common import errors
from .deps import DatabaseDep

router = APIRouter(tags=["health"])


@router.get(
    "/healthz",
    operation_id="health",
    summary="The process is up",
    description="Answers without a key as long as the process runs; says nothing about storage.",
    response_model=Health,
)
def health() -> Health:
    return Health(status="ok")


@router.get(
    "/readyz",
    operation_id="ready",
    summary="The database is reachable",
    description="Answers without a key: 200 when the database answers a query, 503 otherwise.",
    response_model=Health,
    responses=errors(503),
)
def ready(database: DatabaseDep) -> Health:
    try:
        database.ping()
    except Exception as error:  # any driver error means not ready
        raise Problem(503, f"The database is unreachable ({type(error).__name__}).") from None
    return Health(status="ok")
