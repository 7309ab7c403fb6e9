"""The contract every detector follows, and the checks of detector settings.

A detector is a class with keyword-only settings stored under their own names (nothing is
checked in ``__init__``); ``screen`` checks the settings against ``parameter_constraints`` and
returns a :class:`DetectorResult`. Higher scores are always more suspect; the cut-off is a
separate per-respondent array, and ``flags == (scores >= cutoffs)`` wherever the state is
``assessed``.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from enum import IntEnum
from functools import cache
from typing import Any, ClassVar

import numpy as np

from ._text import TextColumn, choose, concat, mapped, names_at, strings, to_objects
from .errors import SettingError
from .instrument import Instrument
from .responses import ResponseMatrix

__all__ = [
    "Detector",
    "DetectorResult",
    "Interval",
    "Options",
    "State",
    "FAMILIES",
]

#: Kinds of evidence; style flags are reported but are not evidence of carelessness.
FAMILIES = ("invariance", "inconsistency", "misfit", "outlier", "effort", "style")


class State(IntEnum):
    """Whether a detector could judge a respondent."""

    ASSESSED = 0
    NOT_ASSESSED = 1  # the index applies but this respondent's data cannot support it (reason given)
    NOT_APPLICABLE = 2  # the index does not apply to this instrument (reason given)

    @property
    def label(self) -> str:
        return self.name.lower()


# Settings constraints, declared as data ---------------------------------------------------------

#: Whole-number settings meet numpy's 64-bit integers in arithmetic, so a larger one cannot be used.
INT64_MIN, INT64_MAX = -(2**63), 2**63 - 1


def _beyond_int64(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and not (
        INT64_MIN <= value <= INT64_MAX
    )


@dataclass(frozen=True)
class Interval:
    """A number (``int`` or ``float``) within bounds; ``closed`` says which ends are included."""

    kind: type
    low: float | None = None
    high: float | None = None
    closed: str = "both"  # both, left, right, neither
    allow_none: bool = False

    def accepts(self, value: Any) -> bool:
        if value is None:
            return self.allow_none
        if isinstance(value, bool):
            return False
        if self.kind is int and not isinstance(value, int | np.integer):
            return False
        if self.kind is float and not isinstance(value, int | float | np.integer | np.floating):
            return False
        if _beyond_int64(value):
            return False
        if self.kind is float and not math.isfinite(float(value)):
            return False
        if self.low is not None:
            if value < self.low or (value == self.low and self.closed in ("right", "neither")):
                return False
        if self.high is not None:
            if value > self.high or (value == self.high and self.closed in ("left", "neither")):
                return False
        return True

    def describe(self) -> str:
        noun = "an integer" if self.kind is int else "a number"
        if self.low is not None and self.high is not None:
            left = "[" if self.closed in ("both", "left") else "("
            right = "]" if self.closed in ("both", "right") else ")"
            text = f"{noun} in {left}{self.low:g}, {self.high:g}{right}"
        elif self.low is not None:
            text = f"{noun} {'>=' if self.closed in ('both', 'left') else '>'} {self.low:g}"
        elif self.high is not None:
            text = f"{noun} {'<=' if self.closed in ('both', 'right') else '<'} {self.high:g}"
        else:
            text = noun
        return text + (" or null" if self.allow_none else "")


@dataclass(frozen=True)
class Options:
    """One of a closed set of values."""

    values: tuple[Any, ...]

    def accepts(self, value: Any) -> bool:
        return value in self.values

    def describe(self) -> str:
        return "one of " + ", ".join(repr(v) for v in self.values)


# Results ------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class DetectorResult:
    """What one detector found for every respondent of a matrix.

    Attributes
    ----------
    name, version : str
    params : mapping
        The settings used.
    scores : ndarray of float64, shape (n,)
        Higher = more suspect; NaN where the state is not ``assessed``.
    cutoffs : ndarray of float64, shape (n,)
        Score at or above which a respondent is flagged (per respondent, since some cut-offs
        depend on how many items were answered).
    flags : ndarray of bool, shape (n,)
        ``scores >= cutoffs`` where assessed; False elsewhere.
    states : ndarray of int8, shape (n,)
        :class:`State` codes.
    reasons : ndarray of object, shape (n,)
        Why a respondent was not assessed or why the index does not apply; None when assessed.
    evidence : mapping of str to ndarray
        Structured values per respondent (first axis n), read by ``sentence``.
    item_ids : tuple of str
        The instrument's item ids, for turning item positions in the evidence into names.
    """

    name: str
    version: str
    family: str
    params: Mapping[str, Any]
    scores: np.ndarray
    cutoffs: np.ndarray
    flags: np.ndarray
    states: np.ndarray
    reasons: np.ndarray
    evidence: Mapping[str, np.ndarray]
    item_ids: tuple[str, ...]
    describe: Callable[[Mapping[str, Any], tuple[str, ...]], str] = field(repr=False)
    #: The same sentences for many respondents at once: evidence columns (already restricted
    #: to the respondents wanted, all assessed) to a column of strings. None: one at a time.
    describe_all: Callable[[Mapping[str, np.ndarray], tuple[str, ...]], TextColumn] | None = (
        field(default=None, repr=False)
    )

    def __len__(self) -> int:
        return len(self.scores)

    def state_of(self, i: int) -> State:
        return State(int(self.states[i]))

    def evidence_for(self, i: int) -> dict[str, Any]:
        """Evidence of respondent ``i`` as plain Python values (JSON-ready)."""
        out: dict[str, Any] = {}
        for key, values in self.evidence.items():
            value = values[i]
            if isinstance(value, np.ndarray):
                value = value.tolist()
            elif isinstance(value, np.generic):
                value = value.item()
            if isinstance(value, float) and math.isnan(value):
                value = None
            out[key] = value
        return out

    def sentence_for(self, i: int) -> str:
        """One sentence a reviewer can read about respondent ``i``."""
        state = self.state_of(i)
        if state is not State.ASSESSED:
            return f"{self.name}: {state.label.replace('_', ' ')} ({self.reasons[i]})."
        return self.describe(self.evidence_for(i), self.item_ids)

    def sentences(self, rows: np.ndarray | None = None) -> np.ndarray:
        """The sentences of respondents ``rows`` (positions; all by default) as a numpy array
        of strings, built for all of them at once; the same text as :meth:`sentence_for`."""
        return to_objects(self.sentence_column(rows))

    def sentence_column(self, rows: np.ndarray | None = None) -> TextColumn:
        """:meth:`sentences` as a text column (an Arrow string array)."""
        rows = np.arange(len(self)) if rows is None else np.asarray(rows, dtype=np.intp)
        states = self.states[rows]
        assessed = states == State.ASSESSED
        parts: list[TextColumn] = []
        order: list[np.ndarray] = []
        if not assessed.all():
            other = ~assessed
            labels = [state.label.replace("_", " ") for state in State]
            parts.append(concat(
                f"{self.name}: ", names_at(labels, states[other]), " (",
                mapped(self.reasons[rows[other]], str), ").",
            ))
            order.append(np.flatnonzero(other))
        if assessed.any():
            chosen = rows[assessed]
            if self.describe_all is None:
                text = [self.describe(self.evidence_for(i), self.item_ids) for i in chosen.tolist()]
                parts.append(strings(np.array(text, dtype=object), len(text)))
            else:
                evidence = {key: values[chosen] for key, values in self.evidence.items()}
                parts.append(strings(self.describe_all(evidence, self.item_ids), len(chosen)))
            order.append(np.flatnonzero(assessed))
        if not parts:
            return strings("", 0)
        import pyarrow as pa

        where = np.empty(len(rows), dtype=np.int64)
        where[np.concatenate(order)] = np.arange(len(rows))
        return pa.concat_arrays(parts).take(where)


# The base class -----------------------------------------------------------------------------------


class Detector:
    """Base class of every detector.

    Subclasses declare ``name``, ``family``, ``summary``, ``reference`` and
    ``parameter_constraints``; take their settings as keyword-only ``__init__`` arguments with
    defaults, stored unchanged under the same names; and implement ``_screen`` (and ``_fit``
    when ``needs_sample``).
    """

    name: ClassVar[str]
    version: ClassVar[str] = "1"
    family: ClassVar[str]
    summary: ClassVar[str]
    reference: ClassVar[str]
    #: True when the detector needs a reference sample (estimated by ``fit``).
    needs_sample: ClassVar[bool] = False
    #: The evidence entries that depend on the other respondents screened with the respondent
    #: (not on the reference sample): screening the respondent alone would not give them
    #: back, so the service keeps their values with the stored result.
    compares_respondents: ClassVar[tuple[str, ...]] = ()
    #: How the cut-off used for the verdict is set. ``"fixed"``: the detector's own cut-off (a
    #: rule of the trade or an exact null model). ``"reference"``: the index's null behaviour
    #: depends on the instrument and the sample, so the screen replaces the detector's own
    #: cut-off by the reference sample's upper quantile at the policy's per-index false-alarm
    #: rate (``detectors.calibration``), unless the instrument or the caller sets
    #: ``cutoff_setting`` explicitly.
    calibration: ClassVar[str] = "fixed"
    #: The setting holding the detector's own cut-off, or None.
    cutoff_setting: ClassVar[str | None] = None
    #: The evidence entry that states the cut-off in the reader's units (rewritten when the
    #: cut-off is calibrated), or None.
    cutoff_evidence: ClassVar[str | None] = None
    #: The most suspect score the index can take, or None. A calibrated cut-off never lies
    #: above it: a block of respondents tied at the most extreme value possible (agreeing with
    #: both sides of every opposite pair) is a careless kind filling the tail, not ordinary
    #: answering, and must not push the cut-off out of reach.
    score_maximum: ClassVar[float | None] = None
    parameter_constraints: ClassVar[dict[str, Interval | Options]] = {}

    # Settings ---------------------------------------------------------------------------------

    @classmethod
    def setting_names(cls) -> list[str]:
        return list(_keyword_defaults(cls.__init__))

    @classmethod
    def defaults(cls) -> dict[str, Any]:
        return dict(_keyword_defaults(cls.__init__))

    def get_params(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in self.setting_names()}

    @classmethod
    def check_settings(cls, settings: Mapping[str, Any]) -> None:
        """Raise SettingError for an unknown setting or a value outside its constraint."""
        names = cls.setting_names()
        for key, value in settings.items():
            if key not in names:
                raise SettingError(
                    cls.name,
                    key,
                    f"{cls.name} has no setting {key!r}; its settings are: {', '.join(names)}.",
                )
            constraint = cls.parameter_constraints.get(key)
            if constraint is not None and not constraint.accepts(value):
                raise SettingError(
                    cls.name,
                    key,
                    f"The {key!r} setting of {cls.name} must be {constraint.describe()}; "
                    f"got {value!r}"
                    + (" (beyond a 64-bit integer)." if _beyond_int64(value) else "."),
                )

    @classmethod
    def from_settings(cls, *layers: Mapping[str, Any] | None) -> Detector:
        """Build with defaults overridden by each layer in turn (instrument, then caller)."""
        merged: dict[str, Any] = {}
        for layer in layers:
            if layer:
                cls.check_settings(layer)
                merged.update(layer)
        return cls(**merged)

    @classmethod
    def model_cutoff(cls, result: DetectorResult, keep: np.ndarray, share: float) -> float | None:
        """For ``calibration == "reference_within_own"``: a cut-off from the detector's chance
        model with its parameters read from the reference respondents ``keep``, at the upper
        tail ``share``; the calibrated cut-off is never above it. None: no such model."""
        return None

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        """A score cut-off (per respondent) in the units of ``cutoff_evidence``; the identity
        unless the score is a transform of what the sentence states."""
        return cutoffs

    # Screening --------------------------------------------------------------------------------

    def fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any] | None:
        """Estimate the reference this detector needs from a sample (JSON-ready), or None."""
        self.check_settings(self.get_params())
        if not self.needs_sample:
            return None
        return self._fit(instrument, matrix)

    def screen(
        self,
        instrument: Instrument,
        matrix: ResponseMatrix,
        reference: Mapping[str, Any] | None = None,
    ) -> DetectorResult:
        """Score every respondent of ``matrix``.

        A detector that needs a sample uses ``reference`` when given (from an earlier ``fit``),
        otherwise it estimates one from ``matrix`` itself.
        """
        self.check_settings(self.get_params())
        if self.needs_sample and reference is None:
            reference = self._fit(instrument, matrix)
        return self._screen(instrument, matrix, reference)

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        raise NotImplementedError

    def _screen(
        self,
        instrument: Instrument,
        matrix: ResponseMatrix,
        reference: Mapping[str, Any] | None,
    ) -> DetectorResult:
        raise NotImplementedError

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        raise NotImplementedError

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        """``_sentence`` for many respondents at once, word for word: evidence columns (the
        respondents wanted, all assessed) to a text column."""
        raise NotImplementedError

    # Helpers for subclasses -------------------------------------------------------------------

    def _result(
        self,
        instrument: Instrument,
        scores: np.ndarray,
        cutoffs: np.ndarray | float,
        states: np.ndarray,
        reasons: np.ndarray,
        evidence: Mapping[str, np.ndarray],
    ) -> DetectorResult:
        """Assemble a result; scores outside ``assessed`` become NaN and flags follow the cut-off."""
        n = len(scores)
        scores = np.asarray(scores, dtype=np.float64).copy()
        cutoffs = np.broadcast_to(np.asarray(cutoffs, dtype=np.float64), (n,)).copy()
        assessed = states == State.ASSESSED
        scores[~assessed] = np.nan
        flags = np.zeros(n, dtype=bool)
        np.greater_equal(scores, cutoffs, out=flags, where=assessed)
        return DetectorResult(
            name=self.name,
            version=self.version,
            family=self.family,
            params=self.get_params(),
            scores=scores,
            cutoffs=cutoffs,
            flags=flags,
            states=states.astype(np.int8),
            reasons=reasons,
            evidence=dict(evidence),
            item_ids=instrument.item_ids,
            describe=self._sentence,
            describe_all=self._sentences,
        )


@cache
def _keyword_defaults(init: Callable[..., None]) -> dict[str, Any]:
    """Keyword-only settings of a detector class's ``__init__`` with their defaults (read once
    per class)."""
    signature = inspect.signature(init)
    return {p.name: p.default for p in signature.parameters.values() if p.kind is p.KEYWORD_ONLY}


@cache
def _blas_controller() -> Any:
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def one_blas_thread() -> Any:
    """A context manager running numpy's linear algebra on one thread. The products detectors
    make are small (thousands of rows by tens of items) and waiting threads would only take
    processor time from the rest of the screening. The loaded libraries are looked up once per
    process: looking them up on every call cost more than a small screening itself."""
    return _blas_controller().limit(limits=1, user_api="blas")


def row_slices(n: int, rows_per_slice: int = 1 << 12) -> Iterator[slice]:
    """Consecutive slices of n respondents, small enough for temporaries to stay in the cache."""
    for start in range(0, n, rows_per_slice):
        yield slice(start, min(start + rows_per_slice, n))


def new_states(n: int) -> tuple[np.ndarray, np.ndarray]:
    """All-assessed state codes and empty reasons for n respondents."""
    return np.zeros(n, dtype=np.int8), np.full(n, None, dtype=object)


def mark(
    states: np.ndarray, reasons: np.ndarray, where: np.ndarray | slice, state: State, reason: str
) -> None:
    """Set ``state`` with ``reason`` for the selected respondents (in place)."""
    states[where] = state
    reasons[where] = reason


def item_range(item_ids: tuple[str, ...], first: int, last: int) -> str:
    """'q05 to q18' (or one id) for evidence sentences."""
    return item_ids[first] if first == last else f"{item_ids[first]} to {item_ids[last]}"


def item_ranges(item_ids: tuple[str, ...], first: np.ndarray, last: np.ndarray) -> np.ndarray:
    """:func:`item_range` of each respondent, as a string column."""
    first_names = names_at(item_ids, first)
    return choose(first == last, first_names, concat(first_names, " to ", names_at(item_ids, last)))
