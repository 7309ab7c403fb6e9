"""The detectors the engine offers, from its registry."""

from __future__ import annotations

import json
from typing import Any

from fastapi import APIRouter

from detectors import REGISTRY

from ..schemas import DetectorInfo, DetectorList
from .common import errors
from .deps import Reader

router = APIRouter(tags=["detectors"])


def _json_safe(value: Any) -> Any:
    try:
        json.dumps(value)
        return value
    except TypeError:
        return repr(value)


@router.get(
    "/v1/detectors",
    operation_id="listDetectors",
    summary="List the detectors with their description, reference and default settings",
    description=(
        "Every detector of the engine: what it measures, its family of evidence, the published "
        "reference and its default settings (a survey's instrument can override them)."
    ),
    response_model=DetectorList,
    responses=errors(401, 403),
)
def list_detectors(caller: Reader) -> DetectorList:
    return DetectorList(
        data=[
            DetectorInfo(
                name=name,
                version=str(cls.version),
                family=cls.family,
                summary=cls.summary,
                reference=cls.reference,
                needs_sample=bool(cls.needs_sample),
                defaults={k: _json_safe(v) for k, v in cls.defaults().items()},
            )
            for name, cls in REGISTRY.items()
        ]
    )
