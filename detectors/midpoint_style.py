"""Midpoint response style: the share of answered items given at the neutral midpoint."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, fixed, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["MidpointStyle"]



class MidpointStyle(Detector):
    """Midpoint response style (MRS): share of answered items at the middle option.

    The answers are compared **raw**: the midpoint is (lowest + highest) / 2 whichever way the
    item is keyed, so reverse keying ((lowest + highest) - x) would change nothing. Only items
    with an odd number of points have a midpoint; items with an even number of points are left
    out, and so are attention-check items. The score is the share of the remaining answered
    items given at the midpoint.

    Parameters
    ----------
    share_cutoff : float in (0, 1], default 0.6
        Flag a respondent with at least this share of answered items at the midpoint. Heedful's
        choice; no published cut-off exists. Under uniformly random answering an item is
        answered at the midpoint with probability 1 / points: 0.2 on 5 points, 0.14 on 7. The
        default is three times the five-point chance share, and with ``min_items`` = 10
        uniformly random answering on 5 points reaches it with probability at most 0.7% for any
        number of answered items from 10 up (largest at exactly 10 items: 6 of 10, 0.64%); on
        7 points at most 0.11%.
    min_items : int >= 1, default 10
        Respondents with fewer answered items that have a midpoint are not assessed. Heedful's
        choice: with 10 items one answer moves the share by 0.1, and shorter lists make the
        binomial tail above jump (3 of 5 items: 5.8% on 5 points).

    Notes
    -----
    Heavy use of the midpoint can mean indifference, a wish not to commit, or not reading the
    items; it is a style, reported in the ``style`` family, not proof of carelessness. Styles
    are measured best on many items of unrelated content (Weijters, Schillewaert & Geuens 2008).

    Not applicable: no item other than attention checks has an odd number of points (reason
    "even number of points: no midpoint"), or fewer than ``min_items`` do. Not assessed: fewer
    than ``min_items`` of them answered.

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
    >>> answers = np.array([[5, 4, 3, 2, 1, 5, 5, 3, 4, 1], [3, 3, 3, 3, 2, 3, 3, 4, 3, np.nan]])
    >>> result = MidpointStyle().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.2, nan], [False, False])
    >>> result.sentence_for(1)
    'midpoint_style: not assessed (fewer than 10 answered items with a midpoint).'
    >>> result = MidpointStyle(min_items=8).screen(
    ...     instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.sentence_for(1)
    'answered 7 of 9 items at the midpoint (0.78; flagged from 0.60)'
    """

    name = "midpoint_style"
    family = "style"
    summary = "Share of answered items given at the neutral midpoint of the scale."
    reference = (
        "Baumgartner, H., & Steenkamp, J.-B. E. M. (2001). Response styles in marketing "
        "research: A cross-national investigation. Journal of Marketing Research, 38(2), 143-156."
    )
    parameter_constraints = {
        "share_cutoff": Interval(float, 0, 1, closed="right"),
        "min_items": Interval(int, 1, None),
    }

    def __init__(self, *, share_cutoff: float = 0.6, min_items: int = 10):
        self.share_cutoff = share_cutoff
        self.min_items = min_items

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        content = instrument.content_items
        columns = content[instrument.points[content] % 2 == 1]
        n, m = matrix.n_respondents, len(columns)
        states, reasons = new_states(n)
        answered = np.zeros(n, dtype=np.int64)
        at_midpoint = np.zeros(n, dtype=np.int64)
        if len(content) == 0:
            not_applicable = "no items other than attention checks"
        elif m == 0:
            not_applicable = "even number of points: no midpoint"
        elif m < self.min_items:
            not_applicable = f"fewer than {self.min_items} items with a midpoint"
        else:
            not_applicable = None
            midpoint = instrument.midpoint[columns].astype(np.int8)[:, None]  # odd points: whole
            for rows in row_slices(n):
                by_item = matrix.answers[rows][:, columns].T  # (items, respondents)
                answered[rows] = (by_item != MISSING).sum(axis=0, dtype=np.int32)
                at_midpoint[rows] = (by_item == midpoint).sum(axis=0, dtype=np.int32)
            mark(
                states, reasons, answered < self.min_items, State.NOT_ASSESSED,
                f"fewer than {self.min_items} answered items with a midpoint",
            )
        if not_applicable is not None:
            mark(states, reasons, slice(None), State.NOT_APPLICABLE, not_applicable)
        share = np.divide(at_midpoint, answered, out=np.full(n, np.nan), where=answered > 0)
        return self._result(
            instrument,
            scores=share,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "items_answered": answered.astype(np.int64),
                "items_at_midpoint": at_midpoint.astype(np.int64),
                "share": share,
                "items_without_midpoint": np.full(n, len(content) - m, dtype=np.int64),
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        left_out = evidence["items_without_midpoint"]
        return (
            f"answered {evidence['items_at_midpoint']} of {evidence['items_answered']} items at "
            f"the midpoint ({evidence['share']:.2f}; flagged from {evidence['share_cutoff']:.2f})"
            + (f"; {left_out} items with an even number of points left out" if left_out else "")
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        left_out = evidence["items_without_midpoint"]
        return concat(
            "answered ", plain(evidence["items_at_midpoint"]), " of ",
            plain(evidence["items_answered"]), " items at the midpoint (",
            fixed(evidence["share"], 2), "; flagged from ", fixed(evidence["share_cutoff"], 2), ")",
            choose(
                left_out != 0,
                concat("; ", plain(left_out), " items with an even number of points left out"), "",
            ),
        )
