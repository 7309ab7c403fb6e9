"""Heedful's screening library: the instrument model, the response matrix, the detectors.

No web or database code lives here; the service and the CLI build on this package.
Names are imported from their modules when first used (``from detectors import lint`` does
not import the detectors), so that commands which do not screen start quickly.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from ._base import FAMILIES, Detector, DetectorResult, Interval, Options, State
    from ._parsing import load_instrument, parse_instrument
    from ._registry import REGISTRY, get_detector
    from .errors import (
        HeedfulError,
        InstrumentError,
        ResponseDataError,
        ResponseProblem,
        SettingError,
    )
    from .instrument import Instrument, Item, ResponseFormat
    from .lint import LintNote, lint
    from .responses import (
        MISSING,
        CheckedAnswers,
        CheckedIds,
        CheckedResponses,
        ResponseMatrix,
        check_answers,
        check_respondent_ids,
        matrix_from_frame,
    )
    from .screening import Screening, build_detectors, fit_references, screen


#: Public name to the module that defines it (the imports above are for type checkers; a test
#: keeps them, this table and ``__all__`` equal).
_ORIGINS = {
    "FAMILIES": "._base", "Detector": "._base", "DetectorResult": "._base",
    "Interval": "._base", "Options": "._base", "State": "._base",
    "load_instrument": "._parsing", "parse_instrument": "._parsing",
    "REGISTRY": "._registry", "get_detector": "._registry",
    "HeedfulError": ".errors", "InstrumentError": ".errors",
    "ResponseDataError": ".errors", "ResponseProblem": ".errors", "SettingError": ".errors",
    "Instrument": ".instrument", "Item": ".instrument", "ResponseFormat": ".instrument",
    "LintNote": ".lint", "lint": ".lint",
    "MISSING": ".responses", "CheckedResponses": ".responses",
    "ResponseMatrix": ".responses", "matrix_from_frame": ".responses",
    "CheckedAnswers": ".responses", "CheckedIds": ".responses",
    "check_answers": ".responses", "check_respondent_ids": ".responses",
    "Screening": ".screening", "build_detectors": ".screening",
    "fit_references": ".screening", "screen": ".screening",
}


def __getattr__(name: str) -> Any:
    origin = _ORIGINS.get(name)
    if origin is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(origin, __name__), name)
    globals()[name] = value
    return value


__all__ = [
    "FAMILIES",
    "MISSING",
    "REGISTRY",
    "CheckedAnswers",
    "CheckedIds",
    "CheckedResponses",
    "Detector",
    "DetectorResult",
    "HeedfulError",
    "Instrument",
    "InstrumentError",
    "Interval",
    "Item",
    "LintNote",
    "Options",
    "ResponseDataError",
    "ResponseFormat",
    "ResponseMatrix",
    "ResponseProblem",
    "Screening",
    "SettingError",
    "State",
    "build_detectors",
    "check_answers",
    "check_respondent_ids",
    "fit_references",
    "get_detector",
    "lint",
    "load_instrument",
    "matrix_from_frame",
    "parse_instrument",
    "screen",
]
