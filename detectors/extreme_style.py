"""Extreme response style: the share of answered items given at either end point of the scale."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, concat, fixed, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["ExtremeStyle"]

#: On an item of two points every answer is an end point, so such items say nothing here.
_MIN_POINTS = 3



class ExtremeStyle(Detector):
    """Extreme response style (ERS): share of answered items at the lowest or highest option.

    The answers are compared **raw**: an end point is an end point whichever way the item is
    keyed, so reverse keying ((lowest + highest) - x) would change nothing. Each item's own
    lowest and highest codes are used, so items with different answer formats can be mixed.
    Attention-check items are left out, and so are two-point items (every answer to them is an
    end point). The score is the share of the remaining answered items given at an end point.

    Parameters
    ----------
    share_cutoff : float in (0, 1], default 0.8
        Flag a respondent with at least this share of answered items at an end point. Heedful's
        choice; no published cut-off exists. Under uniformly random answering an item is
        answered at an end point with probability 2 / points: 0.4 on 5 points, 0.29 on 7. The
        default is twice the five-point chance share, and with ``min_items`` = 10 uniformly
        random answering on 5 points reaches it with probability at most 1.3% for any number of
        answered items from 10 up (the binomial tail is largest at exactly 10 items: 8 of 10,
        1.23%); on 7 points at most 0.11%.
    min_items : int >= 1, default 10
        Respondents with fewer answered items are not assessed. Heedful's choice: with 10 items
        one answer moves the share by 0.1, and shorter lists make the binomial tail above jump
        (4 of 5 items: 8.7% on 5 points).

    Notes
    -----
    An extreme style is a way of using the scale, not carelessness in itself: the flag is
    reported in the ``style`` family. Styles are measured best on many items of unrelated
    content (Weijters, Schillewaert & Geuens 2008); on a single homogeneous scale a respondent
    with a strong opinion is rightly extreme. On three-point items every answer except the
    neutral one is an end point, so the share mostly tells whether the respondent took sides;
    raise ``share_cutoff`` for such instruments.

    Not applicable: fewer than ``min_items`` items other than attention checks and two-point
    items. Not assessed: fewer than ``min_items`` of them answered.

    References
    ----------
    Baumgartner, H., & Steenkamp, J.-B. E. M. (2001). Response styles in marketing research: A
    cross-national investigation. Journal of Marketing Research, 38(2), 143-156.

    Weijters, B., Schillewaert, N., & Geuens, M. (2008). Assessing response styles across modes
    of data collection. Journal of the Academy of Marketing Science, 36(3), 409-422.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 11)]})
    >>> answers = np.array([[5, 4, 3, 2, 1, 5, 5, 3, 4, 1], [5, 5, 5, 1, 1, 5, 1, 5, 4, 5]])
    >>> result = ExtremeStyle().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.5, 0.9], [False, True])
    >>> result.sentence_for(1)
    'answered 9 of 10 items at an end point (0.90: 3 lowest, 6 highest; flagged from 0.80)'
    """

    name = "extreme_style"
    family = "style"
    summary = "Share of answered items given at either end point of the scale."
    reference = (
        "Baumgartner, H., & Steenkamp, J.-B. E. M. (2001). Response styles in marketing "
        "research: A cross-national investigation. Journal of Marketing Research, 38(2), 143-156."
    )
    parameter_constraints = {
        "share_cutoff": Interval(float, 0, 1, closed="right"),
        "min_items": Interval(int, 1, None),
    }

    def __init__(self, *, share_cutoff: float = 0.8, min_items: int = 10):
        self.share_cutoff = share_cutoff
        self.min_items = min_items

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        content = instrument.content_items
        columns = content[instrument.points[content] >= _MIN_POINTS]
        n, m = matrix.n_respondents, len(columns)
        states, reasons = new_states(n)
        answered = np.zeros(n, dtype=np.int64)
        at_lowest = np.zeros(n, dtype=np.int64)
        at_highest = np.zeros(n, dtype=np.int64)
        if len(content) == 0:
            not_applicable = "no items other than attention checks"
        elif m == 0:
            not_applicable = "two-point items only: every answer is an end point"
        elif m < self.min_items:
            not_applicable = f"fewer than {self.min_items} items with three or more points"
        else:
            not_applicable = None
            lowest = instrument.lowest[columns][:, None]
            highest = instrument.highest[columns][:, None]
            for rows in row_slices(n):
                by_item = matrix.answers[rows][:, columns].T  # (items, respondents)
                answered[rows] = (by_item != MISSING).sum(axis=0, dtype=np.int32)
                # MISSING lies below every valid code, so it never equals an end point.
                at_lowest[rows] = (by_item == lowest).sum(axis=0, dtype=np.int32)
                at_highest[rows] = (by_item == highest).sum(axis=0, dtype=np.int32)
            too_few = answered < self.min_items
            mark(
                states, reasons, too_few, State.NOT_ASSESSED,
                f"fewer than {self.min_items} answered items",
            )
        if not_applicable is not None:
            mark(states, reasons, slice(None), State.NOT_APPLICABLE, not_applicable)
        extreme = at_lowest + at_highest
        share = np.divide(extreme, answered, out=np.full(n, np.nan), where=answered > 0)
        return self._result(
            instrument,
            scores=share,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "items_answered": answered.astype(np.int64),
                "items_at_end_point": extreme.astype(np.int64),
                "items_at_lowest": at_lowest.astype(np.int64),
                "items_at_highest": at_highest.astype(np.int64),
                "share": share,
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        return (
            f"answered {evidence['items_at_end_point']} of {evidence['items_answered']} items at "
            f"an end point ({evidence['share']:.2f}: {evidence['items_at_lowest']} lowest, "
            f"{evidence['items_at_highest']} highest; flagged from {evidence['share_cutoff']:.2f})"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        return concat(
            "answered ", plain(evidence["items_at_end_point"]), " of ",
            plain(evidence["items_answered"]), " items at an end point (",
            fixed(evidence["share"], 2), ": ", plain(evidence["items_at_lowest"]), " lowest, ",
            plain(evidence["items_at_highest"]), " highest; flagged from ",
            fixed(evidence["share_cutoff"], 2), ")",
        )
