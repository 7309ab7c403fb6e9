"""Reading an instrument document: the model's own checks (``instrument.py``), then its
``screening`` section against the settings each registered detector accepts.

Kept apart from the model so that the model does not import the registry, which imports every
detector, each of which imports the model.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from ._registry import check_screening_section
from .errors import FieldProblem, InstrumentError
from .instrument import Instrument

__all__ = ["load_instrument", "parse_instrument"]


def _field_problems(error: ValidationError) -> list[FieldProblem]:
    problems = []
    for entry in error.errors():
        location = ""
        for part in entry["loc"]:
            location += f"[{part}]" if isinstance(part, int) else (f".{part}" if location else str(part))
        message = entry["msg"].removeprefix("Value error, ")
        if entry["type"] == "value_error" and not location:
            # The whole-document check lists "location: message" lines.
            for line in message.split("\n"):
                where, _, text = line.partition(": ")
                problems.append(FieldProblem(where, text) if text else FieldProblem("", line))
            continue
        problems.append(FieldProblem(location, message))
    return problems


def parse_instrument(document: Any) -> Instrument:
    """Validate a decoded JSON document as an instrument; raise InstrumentError on problems."""
    try:
        instrument = Instrument.model_validate(document)
    except ValidationError as error:
        raise InstrumentError(_field_problems(error)) from None
    check_screening_section(instrument)
    return instrument


def load_instrument(path: str | Path) -> Instrument:
    """Read and validate an instrument JSON file."""
    path = Path(path)
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InstrumentError([FieldProblem("", f"no such file: {path}")]) from None
    except json.JSONDecodeError as error:
        raise InstrumentError(
            [FieldProblem("", f"{path} is not valid JSON (line {error.lineno}, column {error.colno}): {error.msg}")]
        ) from None
    return parse_instrument(document)
