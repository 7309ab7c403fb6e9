"""Registering a survey: the one use case behind ``PUT /v1/surveys``, ``heedful survey
register`` and the demo."""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from . import store
from .database import Database

__all__ = ["Registration", "register_survey", "SURVEY_ID"]

#: A survey id the service accepts: the instrument's id characters, starting with a letter or
#: digit, so that it is a safe URL path segment and file name (never ``.`` or ``..``).
SURVEY_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.\-]*")


@dataclass(frozen=True)
class Registration:
    """What registering an instrument document did."""

    survey: str
    title: str
    version: int
    new_version: bool
    #: The design warnings of ``detectors.lint`` (code, location, message, readable text).
    lint: list[Any]
    webhook_secret: str


def register_survey(database: Database, document: Any) -> Registration:
    """Parse and check an instrument document (``InstrumentError`` names every problem), then
    store it: a new survey, a new version of a changed one, or nothing new when the same
    document is already the current version."""
    from detectors import InstrumentError, lint, parse_instrument
    from detectors.errors import FieldProblem

    instrument = parse_instrument(document)
    problems = []
    if not SURVEY_ID.fullmatch(instrument.survey):
        problems.append(
            FieldProblem(
                "survey",
                f"survey id {instrument.survey!r} must start with a letter or digit (it names "
                "the survey in URLs and file names)",
            )
        )
    if "\x00" in instrument.title:
        problems.append(FieldProblem("title", "the title holds a NUL character"))
    if problems:
        raise InstrumentError(problems)
    notes = lint(instrument)
    with database.write() as session:
        registered = store.register_version(
            session, instrument.model_dump(mode="json"), instrument.title
        )
        return Registration(
            survey=registered.survey.survey,
            title=registered.survey.title,
            version=registered.version.number,
            new_version=registered.new_version,
            lint=list(notes),
            webhook_secret=registered.survey.webhook_secret,
        )
