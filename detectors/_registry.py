"""Name-to-class registry of every detector; the only list of detectors in the project.

The web service, the CLI and the exports discover detectors here, so adding a detector is:
write its module, add it to ``_DETECTORS`` below, write its tests.
"""

from __future__ import annotations

from ._base import Detector
from .acquiescence import Acquiescence
from .antonym_consistency import AntonymConsistency
from .attention_checks import AttentionChecks
from .content_nonresponsivity import ContentNonresponsivity
from .duplicate_answers import DuplicateAnswers
from .errors import FieldProblem, InstrumentError, SettingError
from .even_odd import EvenOdd
from .extreme_style import ExtremeStyle
from .guttman_errors import GuttmanErrors
from .instrument import Instrument
from .log_likelihood_fit import LogLikelihoodFit
from .long_string import LongString
from .mahalanobis import Mahalanobis
from .midpoint_style import MidpointStyle
from .missing_answers import MissingAnswers
from .person_fit import PersonFit
from .person_scalability import PersonScalability
from .person_total import PersonTotal
from .resampled_reliability import ResampledReliability
from .response_variability import ResponseVariability
from .scale_agreement import ScaleAgreement
from .sequence_pattern import SequencePattern
from .speeding import Speeding
from .straightlining import Straightlining
from .synonym_consistency import SynonymConsistency

__all__ = ["REGISTRY", "get_detector", "check_screening_section"]

_DETECTORS = (
    Acquiescence,
    ExtremeStyle,
    MidpointStyle,
    Straightlining,
    LongString,
    Mahalanobis,
    ResponseVariability,
    EvenOdd,
    MissingAnswers,
    AttentionChecks,
    Speeding,
    DuplicateAnswers,
    SequencePattern,
    SynonymConsistency,
    AntonymConsistency,
    PersonFit,
    PersonTotal,
    ScaleAgreement,
    PersonScalability,
    GuttmanErrors,
    ResampledReliability,
    LogLikelihoodFit,
    ContentNonresponsivity,
)

#: Detector name to class, in the order results are reported.
REGISTRY: dict[str, type[Detector]] = {cls.name: cls for cls in _DETECTORS}


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
