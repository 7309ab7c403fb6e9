"""Speeding: answering faster than the items can be read."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, fixed, general, plain, plural
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["Speeding"]

SECONDS_PER_MINUTE = 60.0


class Speeding(Detector):
    """Speeding: answered items per minute, against the pace at which items can be read.

    ``seconds per item = duration / answered items``, where the duration is the seconds the
    respondent took (the matrix's ``durations``) and answered items counts every answered item
    of the instrument, attention checks included (each had to be read and answered). The score
    is the pace in answered items per minute, ``60 / seconds per item``, so that faster is
    higher; a respondent is flagged at a pace of ``60 / seconds_per_item_cutoff`` or more, i.e.
    at ``seconds_per_item_cutoff`` seconds per item or less.

    The evidence also gives the respondent's speed relative to the others in the matrix:
    ``relative speed = median duration / duration``, the median taken over the respondents of
    the matrix with a usable duration (Leiner, 2019); 2 means twice as fast as the typical
    respondent. It is reported, not used for the flag.

    Parameters
    ----------
    seconds_per_item_cutoff : float > 0, default 2.0
        Flag a respondent who took this many seconds per answered item or less. Huang et al.
        (2012) propose under 2 seconds per item as the pace at which an item cannot have been
        read and considered (checked in a secondary source only).

    Notes
    -----
    The duration covers the whole survey, the count only the instrument's items: on a survey
    with other questions (demographics, open text) the seconds per item are overstated and
    fewer speeders are flagged, never more. Durations measured by the platform include pauses,
    so a respondent can speed through part of a survey and still average above the cut-off.
    Short, simple items (a name, yes/no) can be answered attentively in under two seconds; the
    cut-off is meant for statements rated on an agreement scale.

    The relative speed depends on the respondents in the matrix: in a small batch (a single
    post to the service) it says little; the nightly re-screen compares each respondent with
    the stored ones of the survey version (in the re-screen's chunks).

    Not assessed: the data has no durations; the respondent's duration is missing, not a finite
    number of seconds >= 0, or zero (a timing error: no one answers in no time); or no item was
    answered. A flag is evidence for a reviewer's decision, not a verdict.

    References
    ----------
    Huang, J. L., Curran, P. G., Keeney, J., Poposki, E. M., & DeShon, R. P. (2012). Detecting
    and deterring insufficient effort responding to surveys. Journal of Business and
    Psychology, 27(1), 99-114.

    Leiner, D. J. (2019). Too fast, too straight, too weird: Non-reactive indicators for
    meaningless data in internet surveys. Survey Research Methods, 13(3), 229-248. (Cited from
    memory, not checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 11)]})
    >>> answers = np.tile([1.0, 2, 3, 4, 5, 4, 3, 2, 1, 2], (3, 1))
    >>> durations = np.array([15.0, 120.0, 90.0])
    >>> matrix = ResponseMatrix.from_arrays(instrument, answers, durations=durations)
    >>> result = Speeding().screen(instrument, matrix)
    >>> result.scores.tolist(), result.flags.tolist()
    ([40.0, 5.0, 6.666666666666667], [True, False, False])
    >>> result.sentence_for(0)
    '1.5 seconds per answered item (15 s for 10 items; flagged at 2 s or less), 6.0 times as \
fast as the median respondent (90 s)'
    """

    name = "speeding"
    compares_respondents = ("relative_speed", "median_duration_seconds")
    family = "effort"
    summary = "Answered items per minute; flagged at 2 seconds per item or less."
    reference = (
        "Huang, J. L., Curran, P. G., Keeney, J., Poposki, E. M., & DeShon, R. P. (2012). "
        "Detecting and deterring insufficient effort responding to surveys. Journal of "
        "Business and Psychology, 27(1), 99-114."
    )
    parameter_constraints = {
        "seconds_per_item_cutoff": Interval(float, 0, None, closed="neither"),
    }

    def __init__(self, *, seconds_per_item_cutoff: float = 2.0):
        self.seconds_per_item_cutoff = seconds_per_item_cutoff

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        answered = np.zeros(n, dtype=np.int64)
        for rows in row_slices(n):
            answered[rows] = (matrix.answers[rows] != MISSING).sum(axis=1)
        if matrix.durations is None:
            durations = np.full(n, np.nan)
            mark(states, reasons, slice(None), State.NOT_ASSESSED, "the data has no durations")
        else:
            durations = np.asarray(matrix.durations, dtype=np.float64)
            missing = np.isnan(durations)
            unusable = ~missing & (~np.isfinite(durations) | (durations < 0))
            mark(states, reasons, missing, State.NOT_ASSESSED, "no duration recorded")
            mark(
                states, reasons, unusable, State.NOT_ASSESSED,
                "the duration is not a finite number of seconds >= 0",
            )
            mark(
                states, reasons, durations == 0, State.NOT_ASSESSED,
                "the duration is 0 seconds (a timing error)",
            )
        mark(states, reasons, answered == 0, State.NOT_ASSESSED, "no item answered")
        usable = np.isfinite(durations) & (durations > 0)
        median = float(np.median(durations[usable])) if usable.any() else np.nan
        judged = states == State.ASSESSED
        seconds_per_item = np.divide(
            durations, answered, out=np.full(n, np.nan), where=judged
        )
        pace = np.divide(
            SECONDS_PER_MINUTE, seconds_per_item, out=np.full(n, np.nan), where=judged
        )
        relative = np.divide(median, durations, out=np.full(n, np.nan), where=judged)
        cutoff = float(self.seconds_per_item_cutoff)
        return self._result(
            instrument,
            scores=pace,
            cutoffs=SECONDS_PER_MINUTE / cutoff,
            states=states,
            reasons=reasons,
            evidence={
                "seconds_per_item": seconds_per_item,
                "duration_seconds": np.where(judged, durations, np.nan),
                "items_answered": answered,
                "relative_speed": relative,
                "median_duration_seconds": np.where(judged, median, np.nan),
                "seconds_per_item_cutoff": np.full(n, cutoff),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        answered = evidence["items_answered"]
        text = (
            f"{evidence['seconds_per_item']:.1f} seconds per answered item "
            f"({_seconds(evidence['duration_seconds'])} s for {answered} "
            f"item{'s' if answered != 1 else ''}; flagged at "
            f"{evidence['seconds_per_item_cutoff']:g} s or less)"
        )
        relative = evidence["relative_speed"]
        median = _seconds(evidence["median_duration_seconds"])
        if relative >= 1:
            return text + f", {relative:.1f} times as fast as the median respondent ({median} s)"
        return text + f", took {1 / relative:.1f} times as long as the median respondent ({median} s)"

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        answered = evidence["items_answered"]
        relative = evidence["relative_speed"]
        median = _seconds_all(evidence["median_duration_seconds"])
        with np.errstate(divide="ignore"):
            slower = fixed(1 / relative, 1)
        return concat(
            fixed(evidence["seconds_per_item"], 1), " seconds per answered item (",
            _seconds_all(evidence["duration_seconds"]), " s for ", plain(answered), " item",
            plural(answered), "; flagged at ", general(evidence["seconds_per_item_cutoff"]),
            " s or less)",
            choose(
                relative >= 1,
                concat(", ", fixed(relative, 1), " times as fast as the median respondent ("),
                concat(", took ", slower, " times as long as the median respondent ("),
            ),
            median, " s)",
        )


def _seconds(value: float) -> str:
    return f"{value:.0f}" if value >= 10 else f"{value:.1f}"


def _seconds_all(values: np.ndarray) -> np.ndarray:
    """:func:`_seconds` of each respondent."""
    return choose(values >= 10, fixed(values, 0), fixed(values, 1))
