"""Name-to-class registry of every detector; the only list of detectors in the project.

The web service, the CLI and the exports discover detectors here, so adding a detector is:
write its module (named after the detector), add it to ``_DETECTORS`` below, write its tests.

A detector's module is imported the first time its class is asked for, so that a command which
only checks an instrument document imports the detectors its ``screening`` section names and
no others; iterating over the registry's classes imports every module.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from importlib import import_module
from typing import TYPE_CHECKING

from .errors import FieldProblem, InstrumentError, SettingError

if TYPE_CHECKING:
    from ._base import Detector
    from .instrument import Instrument

__all__ = ["REGISTRY", "get_detector", "check_screening_section"]

#: Detector name and class name, in the order results are reported; each lives in the module
#: ``detectors.<name>``.
_DETECTORS = (
    ("acquiescence", "Acquiescence"),
    ("extreme_style", "ExtremeStyle"),
    ("midpoint_style", "MidpointStyle"),
    ("straightlining", "Straightlining"),
    ("long_string", "LongString"),
    ("mahalanobis", "Mahalanobis"),
    ("response_variability", "ResponseVariability"),
    ("even_odd", "EvenOdd"),
    ("missing_answers", "MissingAnswers"),
    ("attention_checks", "AttentionChecks"),
    ("speeding", "Speeding"),
    ("duplicate_answers", "DuplicateAnswers"),
    ("sequence_pattern", "SequencePattern"),
    ("synonym_consistency", "SynonymConsistency"),
    ("antonym_consistency", "AntonymConsistency"),
    ("person_fit", "PersonFit"),
    ("person_total", "PersonTotal"),
    ("scale_agreement", "ScaleAgreement"),
    ("person_scalability", "PersonScalability"),
    ("guttman_errors", "GuttmanErrors"),
    ("resampled_reliability", "ResampledReliability"),
    ("log_likelihood_fit", "LogLikelihoodFit"),
    ("content_nonresponsivity", "ContentNonresponsivity"),
)


class _Registry(Mapping[str, "type[Detector]"]):
    """Detector name to class; a class is imported when it is first looked up."""

    def __init__(self, entries: tuple[tuple[str, str], ...]) -> None:
        self._class_names = dict(entries)
        self._classes: dict[str, type[Detector]] = {}

    def __getitem__(self, name: str) -> type[Detector]:
        found = self._classes.get(name)
        if found is None:
            class_name = self._class_names[name]  # KeyError for an unknown name
            found = getattr(import_module(f"{__package__}.{name}"), class_name)
            if found.name != name:
                raise RuntimeError(f"{class_name}.name is {found.name!r}, registered as {name!r}")
            self._classes[name] = found
        return found

    def __iter__(self) -> Iterator[str]:
        return iter(self._class_names)

    def __len__(self) -> int:
        return len(self._class_names)

    def __contains__(self, name: object) -> bool:
        return name in self._class_names

    def __repr__(self) -> str:
        return f"REGISTRY({', '.join(self._class_names)})"


#: Detector name to class, in the order results are reported.
REGISTRY: Mapping[str, type[Detector]] = _Registry(_DETECTORS)


def get_detector(name: str) -> type[Detector]:
    try:
        return REGISTRY[name]
    except KeyError:
        raise KeyError(
            f"unknown detector {name!r}; known detectors: {', '.join(REGISTRY)}"
        ) from None


def check_screening_section(instrument: Instrument) -> None:
    """Check the instrument's ``screening`` settings against each detector's constraints."""
    problems = []
    for name, settings in instrument.screening.items():
        if name not in REGISTRY:
            problems.append(
                FieldProblem(
                    f"screening.{name}",
                    f"unknown detector; known detectors: {', '.join(REGISTRY)}",
                )
            )
            continue
        for key, value in settings.items():
            try:
                REGISTRY[name].check_settings({key: value})
            except SettingError as error:
                problems.append(FieldProblem(f"screening.{name}.{key}", str(error)))
    if problems:
        raise InstrumentError(problems)
