"""``GET /metrics``: the service's metrics in the Prometheus text format."""

from __future__ import annotations

import hmac
import ipaddress

from fastapi import APIRouter, Request, Response

from ..metrics import CONTENT_TYPE
from ..problems import Problem
from .common import errors
from .deps import SettingsDep

router = APIRouter(tags=["health"])

_EXAMPLE = (
    "# HELP heedful_respondents_total Respondents of posted responses by outcome (stored, "
    "replaced, duplicate, rejected).\n"
    "# TYPE heedful_respondents_total counter\n"
    'heedful_respondents_total{outcome="stored"} 1520.0\n'
    'heedful_respondents_total{outcome="duplicate"} 4.0\n'
)


@router.get(
    "/metrics",
    operation_id="metrics",
    summary="Metrics in the Prometheus text format",
    description=(
        "Posts by outcome, refusals by reason, request latency by route, the ingest queue's "
        "depth, flags raised by detector, jobs by kind and outcome. With `HEEDFUL_METRICS_TOKEN` "
        "set, send it as `Authorization: Bearer <token>`; without it, only requests from the "
        "loopback address are answered."
    ),
    responses=errors(
        401, 403,
        also={200: {"description": "The metrics",
                    "content": {CONTENT_TYPE: {"schema": {"type": "string"}, "example": _EXAMPLE}}}},
    ),
    response_class=Response,
)
def metrics(request: Request, settings: SettingsDep) -> Response:
    token = settings.metrics_token
    if token is not None:
        scheme, _, given = (request.headers.get("authorization") or "").partition(" ")
        if scheme.lower() != "bearer" or not hmac.compare_digest(given.strip(), token):
            raise Problem(
                401, "Send the metrics token as 'Authorization: Bearer <token>'.",
                kind="unauthenticated", headers={"WWW-Authenticate": "Bearer"},
            )
    elif not _loopback(request.client.host if request.client else None):
        raise Problem(
            403,
            "Metrics are answered to the loopback address only; set HEEDFUL_METRICS_TOKEN to "
            "scrape them from elsewhere.",
            kind="forbidden",
        )
    return Response(request.app.state.metrics.render(), media_type=CONTENT_TYPE)


def _loopback(host: str | None) -> bool:
    if host is None:
        return False
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return host in ("localhost", "testclient")


__all__ = ["router"]
