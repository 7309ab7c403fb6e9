"""Scale agreement: does each answer agree with the respondent's other answers on its scale?"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import (
    Detector,
    DetectorResult,
    Interval,
    State,
    mark,
    new_states,
    one_blas_thread,
    row_slices,
)
from ._text import TextColumn, choose, concat, fixed, plain
from .instrument import Instrument
from .person_total import keyed_slices
from .responses import ResponseMatrix

__all__ = ["ScaleAgreement"]


class ScaleAgreement(Detector):
    """Scale agreement: each keyed answer against the respondent's mean of the rest of its scale.

    This index is Heedful's own. It follows the logic of the person-total correlation (a
    respondent's answers correlated with a profile they should follow) and of the
    within-person consistency indices such as even-odd consistency (the respondent's answers to
    one scale should agree with each other), but it has not been published or validated
    outside Heedful.

    Only scales with at least ``min_scale_items`` items (attention checks left out) take part.
    Answers are reverse keyed where the item is keyed -1 (x' = lowest + highest - x). For each
    answered item j of scale s, the rest mean is the respondent's mean of the other answered
    items of s::

        rest_j = (S_s - x'_j) / (c_s - 1)

    with S_s the sum and c_s the number of the respondent's keyed answers on scale s (scales
    with c_s >= 2). The index is the Pearson correlation r, across all these answered items,
    between x'_j and rest_j. An attentive respondent high on a scale answers its items high
    and low on another answers those low, so answers and rest means rise and fall together
    across scales; random answering gives r near or somewhat below 0 (see Notes). The score is **the negative of r**, so that
    a higher score is more suspect, and a respondent is flagged when r is at or below
    ``consistency_cutoff``.

    The rest means are never formed one by one: the five sums r needs follow from each scale's
    sum S, count c and sum of squares Q of keyed answers (three matrix products per slice of
    respondents), since over the items of one scale::

        sum_j rest_j = S,   sum_j x'_j rest_j = (S² - Q) / (c - 1),
        sum_j rest_j² = ((c - 2) S² + Q) / (c - 1)².

    The screen replaces the detector's own cut-off by the reference sample's quantile
    (``calibration = "reference"``); ``consistency_cutoff`` is the fallback and the value an
    instrument or caller may set explicitly.

    Parameters
    ----------
    consistency_cutoff : float in [-1, 1], default -0.2
        Flag when r is at or below this value, used only where the cut-off is not calibrated
        from the reference. Heedful's choice: random answering centres r somewhat below 0 (see
        Notes), and attentive respondents fall at or below 0 too often for a fallback. On the
        bfi data (5 scales of 5 six-point items, 2,800 respondents) 13.2% of the respondents
        have r at or below 0 and 6.8% at or below -0.2, against 67% and 44% of uniformly
        random answerers (measured with this code).
    min_scale_items : int >= 2, default 3
        Only scales with at least this many items take part: on a scale of two items the rest
        mean is a single answer, and it wants a few items to stand for the respondent's level.
    min_scales : int >= 2, default 2
        The index applies only with at least this many such scales, and a respondent is
        assessed only with at least two answered items on at least this many scales. Within
        one scale the rest mean falls exactly as the answer rises (r = -1 whatever the
        answers), so the index needs the contrast between scales.

    Notes
    -----
    Under random answering r is centred below 0, not at it. With c answered items on every
    scale, B the between-scale and W the within-scale sum of squares of the keyed answers::

        r = (B - W / (c - 1)) / sqrt((B + W) (B + W / (c - 1)²))

    Within a scale the rest mean falls as the answer rises (the -W / (c - 1) term, built in by
    the leave-one-out), while differences between the respondent's scale levels (B) pull r
    up. Uniformly random answers to 5 scales of 5 six-point items give a mean r of about -0.16
    (simulated with this code). The index therefore rests on the respondent's scale levels
    differing: an attentive respondent who stands at about the same level on every scale (or
    an instrument of scales that measure nearly the same thing) shows little contrast between
    scales, and r is small or negative for them, a reason why the index is calibrated on a
    reference sample and why a flag is evidence for a human to look at, never a verdict on the
    person. With few scales r rests on few contrasts and is noisy.

    A respondent giving one answer throughout on uniformly keyed scales has no variance and is
    not assessed (``straightlining`` and ``long_string`` judge that case); on scales with mixed
    keying the same answers disagree with their rest means and are flagged.

    Not applicable: fewer than ``min_scales`` scales of ``min_scale_items`` or more items. Not
    assessed: fewer than ``min_scales`` scales with two or more answers, or keyed answers that
    do not vary.

    References
    ----------
    Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in survey
    data. Journal of Experimental Social Psychology, 66, 4-19.

    Johnson, J. A. (2005). Ascertaining the validity of individual protocols from Web-based
    personality inventories. Journal of Research in Personality, 39(1), 103-129.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"{s}{i}", "scale": s} for s in "ab" for i in range(1, 4)]})
    >>> answers = np.array([[5, 4, 5, 2, 1, 2], [5, 1, 3, 2, 4, 3]])
    >>> result = ScaleAgreement().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.round(6).tolist(), result.flags.tolist()
    ([-0.895894, 1.0], [False, True])
    >>> result.sentence_for(1)
    'answers disagree with the rest of their scales: r -1.00 between each answer and the mean \
of the other answers on its scale, over 6 items of 2 scales (flagged at -0.20 or less)'
    """

    name = "scale_agreement"
    family = "inconsistency"
    summary = "Within-person correlation of each keyed answer with the rest of its scale."
    reference = (
        "Heedful's own index, after Curran, P. G. (2016). Methods for the detection of "
        "carelessly invalid responses in survey data. Journal of Experimental Social "
        "Psychology, 66, 4-19."
    )
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "consistency_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cutoffs  # the score is the negative of the value the sentence states
    parameter_constraints = {
        "consistency_cutoff": Interval(float, -1, 1),
        "min_scale_items": Interval(int, 2, None),
        "min_scales": Interval(int, 2, None),
    }

    def __init__(
        self, *, consistency_cutoff: float = -0.2, min_scale_items: int = 3, min_scales: int = 2
    ):
        self.consistency_cutoff = consistency_cutoff
        self.min_scale_items = min_scale_items
        self.min_scales = min_scales

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        scales = [
            columns for columns in instrument.scales.values()
            if len(columns) >= self.min_scale_items
        ]
        r = np.full(n, np.nan)
        scales_used = np.zeros(n, dtype=np.int64)
        items_used = np.zeros(n, dtype=np.int64)
        if len(scales) < self.min_scales:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"fewer than {self.min_scales} scales of {self.min_scale_items} or more items",
            )
        else:
            _correlations(instrument, matrix, scales, r, scales_used, items_used)
            few = scales_used < self.min_scales
            mark(
                states, reasons, few, State.NOT_ASSESSED,
                f"fewer than {self.min_scales} scales with two or more answered items",
            )
            mark(
                states, reasons, ~few & np.isnan(r), State.NOT_ASSESSED,
                "the answers (after reverse keying) do not vary, so their correlation with the "
                "rest of their scales is undefined",
            )
        return self._result(
            instrument,
            scores=-r,
            cutoffs=-float(self.consistency_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "correlation": r,
                "scales_used": scales_used,
                "items_used": items_used,
                "consistency_cutoff": np.full(n, float(self.consistency_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        r, cutoff = evidence["correlation"], evidence["consistency_cutoff"]
        verb = "agree with" if r > 0 else ("disagree with" if r < 0 else "do not agree with")
        return (
            f"answers {verb} the rest of their scales: r {r:.2f} between each answer and the "
            f"mean of the other answers on its scale, over {evidence['items_used']} items of "
            f"{evidence['scales_used']} scales (flagged at {cutoff:.2f} or less)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        r = evidence["correlation"]
        verb = choose(r > 0, "agree with", choose(r < 0, "disagree with", "do not agree with"))
        return concat(
            "answers ", verb, " the rest of their scales: r ", fixed(r, 2),
            " between each answer and the mean of the other answers on its scale, over ",
            plain(evidence["items_used"]), " items of ", plain(evidence["scales_used"]),
            " scales (flagged at ", fixed(evidence["consistency_cutoff"], 2), " or less)",
        )


def _correlations(
    instrument: Instrument,
    matrix: ResponseMatrix,
    scales: list[np.ndarray],
    r: np.ndarray,
    scales_used: np.ndarray,
    items_used: np.ndarray,
) -> None:
    """Fill r and the counts of usable scales and items, slice by slice."""
    columns = np.sort(np.concatenate(scales))
    membership = np.zeros((len(scales), len(columns)), dtype=np.float32)
    for s, scale in enumerate(scales):
        membership[s, np.searchsorted(columns, scale)] = 1
    # One BLAS thread: the products are thin (scales by k by 4,096) and waiting threads would
    # only take processor time from the rest of the screening.
    with one_blas_thread():
        # Keyed codes are whole numbers in -50..59, so every partial sum of the products stays
        # below 2**24 even on a scale of 1,000 items: float32 is exact here whatever the order
        # of summation.
        slices = list(row_slices(matrix.n_respondents))
        size = max((rows.stop - rows.start for rows in slices), default=0)
        squares_buffer = np.empty((size, len(columns)), dtype=np.float32)
        for rows, keyed, answered in keyed_slices(
            instrument, matrix, columns, np.float32, slices
        ):
            squared = np.multiply(keyed, keyed, out=squares_buffer[: len(keyed)])
            # Weights on the left: scales by respondents, so the sums over scales below run
            # along contiguous rows. Per scale: count c, sum S and sum of squares Q.
            count = (membership @ answered.T).astype(np.float64)
            total = (membership @ keyed.T).astype(np.float64)
            squares = (membership @ squared.T).astype(np.float64)
            usable = count >= 2
            # Scales with fewer than two answers have no rest mean and drop out. (One answer
            # would add nothing to the sums of rest means below anyway: S² - Q = 0 there.)
            count *= usable
            total *= usable
            squares *= usable
            inverse = 1 / np.maximum(count - 1, 1)
            total_squared = total * total
            cells = count.sum(axis=0)
            sum_x = total.sum(axis=0)  # equals the sum of the rest means
            sum_xx = squares.sum(axis=0)
            sum_xr = ((total_squared - squares) * inverse).sum(axis=0)
            sum_rr = (((count - 2) * total_squared + squares) * (inverse * inverse)).sum(axis=0)
            spread = cells * sum_xx - sum_x * sum_x  # whole numbers: zero exactly when flat
            rest_spread = cells * sum_rr - sum_x * sum_x
            covariance = cells * sum_xr - sum_x * sum_x
            varies = (spread > 0) & (rest_spread > 1e-12 * cells * sum_rr)
            chunk = np.divide(
                covariance, np.sqrt(spread * rest_spread),
                out=np.full(len(cells), np.nan), where=varies,
            )
            np.clip(chunk, -1.0, 1.0, out=r[rows])
            scales_used[rows] = usable.sum(axis=0)
            items_used[rows] = cells
