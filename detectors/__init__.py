"""Heedful's screening library: the instrument model, the response matrix, the detectors.

No web or database code lives here; the service and the CLI build on this package.
"""

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
from .responses import MISSING, CheckedResponses, ResponseMatrix, matrix_from_frame
from .screening import Screening, build_detectors, fit_references, screen

__all__ = [
    "FAMILIES",
    "MISSING",
    "REGISTRY",
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
    "fit_references",
    "get_detector",
    "lint",
    "load_instrument",
    "matrix_from_frame",
    "parse_instrument",
    "screen",
]
