"""Person-total correlation: do a respondent's answers follow the sample's item profile?"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
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
from .mahalanobis import _mismatch
from .responses import MISSING, ResponseMatrix

__all__ = ["PersonTotal", "keyed_slices"]


def keyed_slices(
    instrument: Instrument,
    matrix: ResponseMatrix,
    columns: np.ndarray,
    dtype: type,
    slices: Iterable[slice],
) -> Iterator[tuple[slice, np.ndarray, np.ndarray]]:
    """For each slice of respondents: the answers to ``columns`` (sorted) reverse keyed where
    the item is keyed -1 (x' = lowest + highest - x) with 0 where missing, and the answered
    mask (1 or 0), both as ``dtype`` for matrix products.

    The keying is done on the 8-bit codes, where a pass costs an eighth of one in float64 (a
    keyed code stays within its item's range, so it fits). The two arrays are views of buffers
    reused from slice to slice (fresh arrays of this size would be paged in by the system
    every time, which costs more than the arithmetic); use them before the next slice.
    """
    reverse = instrument.keyed[columns] == -1
    sign = np.where(reverse, -1, 1).astype(np.int8)
    shift = np.where(reverse, instrument.lowest[columns] + instrument.highest[columns], 0)
    shift = shift.astype(np.int8)
    slices = list(slices)
    size = max((rows.stop - rows.start for rows in slices), default=0)
    keyed_buffer = np.empty((size, len(columns)), dtype=dtype)
    answered_buffer = np.empty((size, len(columns)), dtype=dtype)
    everything = len(columns) == matrix.n_items  # sorted columns: all of them, in order
    for rows in slices:
        block = matrix.answers[rows]
        if not everything:
            block = np.take(block, columns, axis=1)
        answered = block != MISSING
        # The missing code wraps around in 8 bits here; those cells are set to 0 just after.
        codes = block * sign
        codes += shift
        codes *= answered
        keyed, mask = keyed_buffer[: len(block)], answered_buffer[: len(block)]
        np.copyto(keyed, codes)
        np.copyto(mask, answered)
        yield rows, keyed, mask


class PersonTotal(Detector):
    """Person-total correlation: the respondent's answers against the sample's item means.

    A reference sample gives every content item (attention checks left out) its mean answer
    after reverse keying (x' = lowest + highest - x for items keyed -1), one profile over all
    items together: which statements the sample endorses strongly and which weakly. For each
    respondent, the Pearson correlation across the m items they answered between their keyed
    answers x'_j and the reference means mean_j is the index::

        r = sum (x'_j - mean x') (mean_j - mean of mean_j) /
            sqrt( sum (x'_j - mean x')² sum (mean_j - mean of mean_j)² )

    (the means over the m answered items). An attentive respondent agrees more with the
    statements most people agree with, so their answers follow the profile (r clearly above
    0); random answering ignores the content and gives r near 0. The score is **the negative of
    r**, so that a higher score is more suspect, and a respondent is flagged when r is at or
    below ``consistency_cutoff``.

    The reference (``fit``; the service keeps one per survey) is a JSON-ready dict of the
    items, their keying, the keyed means and the respondents behind each mean. Because the
    index's spread under attentive answering depends on the instrument and the sample, the
    screen replaces the detector's own cut-off by the reference sample's quantile
    (``calibration = "reference"``); ``consistency_cutoff`` is the fallback and the value an
    instrument or caller may set explicitly.

    Parameters
    ----------
    consistency_cutoff : float in [-1, 1], default -0.2
        Flag when r is at or below this value. Heedful's choice, used only where the cut-off is
        not calibrated from the reference; no published cut-off is known to us (from memory).
        r = 0 is the expectation under random answering, but attentive respondents fall below
        it too often for a fallback: on the bfi data (25 six-point items, 2,800 respondents)
        12.8% of the respondents have r at or below 0 and 4.1% at or below -0.2, against 50%
        and 17% of uniformly random answerers (measured with this code). -0.2 keeps the
        false alarms low where the cut-off is not calibrated on the reference sample.
    min_items : int >= 3, default 10
        A respondent is assessed only with at least this many answered items, and the index
        applies only to instruments with at least this many items other than attention checks.
        Under random answering r has a standard deviation of about 1 / sqrt(m - 1) (common
        practice, no source): 0.33 for 10 items, so fewer items leave random and attentive
        answering hard to tell apart.

    Notes
    -----
    The index rests entirely on items differing in popularity. On an instrument whose items
    all have similar keyed means (homogeneous statements, or a sample spread evenly across each
    item), the profile is nearly flat and small chance differences decide r: the index is weak
    there even for attentive respondents, and not assessed at all when the means are exactly
    equal. It is weak too for a respondent whose own trait levels run against the sample's
    profile (someone who honestly disagrees with the popular statements), which is one reason
    a flag is evidence for a human to look at, never a verdict on the person.

    The profile is taken over all items together, not scale by scale: the correlation needs
    many items (over one scale's handful it is mostly noise), and the differences in popularity
    between scales are part of what an attentive respondent follows.

    The means come from the reference sample including the respondent when the sample is the
    screened data itself; with more than a few dozen respondents one person's share of a mean
    is negligible, so no leave-one-out correction is made. A reference sample full of careless
    respondents flattens the profile and weakens the index. A respondent giving one answer
    throughout on uniformly keyed items has no variance and is not assessed (``straightlining``
    and ``long_string`` judge that case); on mixed keying such answers run against the profile
    and are flagged.

    Not applicable: fewer than ``min_items`` items other than attention checks. Not assessed:
    the reference was estimated on other items or keying, gives a mean for fewer than
    ``min_items`` items, or has equal means; the respondent answered fewer than ``min_items``
    items, or their keyed answers (or the reference means of the items they answered) do not
    vary.

    References
    ----------
    Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in survey
    data. Journal of Experimental Social Psychology, 66, 4-19.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}", "keyed": -1 if i == 4 else 1} for i in range(1, 7)]})
    >>> sample = ResponseMatrix.from_arrays(instrument, np.array(
    ...     [[5, 4, 4, 2, 2, 1], [4, 4, 3, 1, 2, 1], [5, 3, 3, 2, 1, 2], [4, 5, 3, 2, 2, 1]]))
    >>> detector = PersonTotal(min_items=5)
    >>> reference = detector.fit(instrument, sample)
    >>> reference["item_means"]
    [4.5, 4.0, 3.25, 4.25, 1.75, 1.25]
    >>> answers = np.array([[5, 4, 3, 1, 2, 1], [1, 3, 5, 2, 4, 3]])
    >>> result = detector.screen(instrument, ResponseMatrix.from_arrays(instrument, answers), reference)
    >>> result.scores.round(6).tolist(), result.flags.tolist()
    ([-0.978593, 0.303571], [False, True])
    >>> result.sentence_for(1)
    "answers run against the reference sample's item profile: r -0.30 with the sample's item \
means over 6 answered items (flagged at -0.20 or less)"
    """

    name = "person_total"
    family = "misfit"
    summary = "Within-person correlation of the keyed answers with the sample's item means."
    reference = (
        "Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in "
        "survey data. Journal of Experimental Social Psychology, 66, 4-19."
    )
    needs_sample = True
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "consistency_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cutoffs  # the score is the negative of the value the sentence states
    parameter_constraints = {
        "consistency_cutoff": Interval(float, -1, 1),
        "min_items": Interval(int, 3, None),
    }

    def __init__(self, *, consistency_cutoff: float = -0.2, min_items: int = 10):
        self.consistency_cutoff = consistency_cutoff
        self.min_items = min_items

    # The reference ----------------------------------------------------------------------------

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        columns = instrument.content_items
        k = len(columns)
        sums = np.zeros(k, dtype=np.int64)
        counts = np.zeros(k, dtype=np.int64)
        slices = row_slices(matrix.n_respondents)
        for _, keyed, answered in keyed_slices(instrument, matrix, columns, np.float64, slices):
            sums += keyed.sum(axis=0).astype(np.int64)  # whole numbers: exact
            counts += answered.sum(axis=0).astype(np.int64)
        means = [
            None if count == 0 else total / count
            for total, count in zip(sums.tolist(), counts.tolist(), strict=True)
        ]
        return {
            "items": [instrument.item_ids[c] for c in columns],
            "keyed": instrument.keyed[columns].tolist(),
            "respondents": int(matrix.n_respondents),
            "item_means": means,
            "item_respondents": counts.tolist(),
        }

    def _reference_problem(
        self, instrument: Instrument, reference: Mapping[str, Any]
    ) -> str | None:
        """Why a stored reference cannot serve this instrument and these settings (or None)."""
        columns = instrument.content_items
        item_ids = [instrument.item_ids[c] for c in columns]
        if list(reference.get("items", [])) != item_ids:
            return _mismatch(list(reference.get("items", [])), item_ids)
        if list(reference.get("keyed", [])) != instrument.keyed[columns].tolist():
            return "the reference was estimated with other keying of the items; estimate it again"
        means = [m for m in reference["item_means"] if m is not None]
        if len(means) < self.min_items:
            return (
                f"the reference sample answered only {len(means)} of the {len(item_ids)} items; "
                f"{self.min_items} needed"
            )
        if max(means) - min(means) <= 1e-12 * max(1.0, abs(max(means))):
            return (
                "the reference sample's item means are all equal, so there is no item profile "
                "to follow"
            )
        return None

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        n = matrix.n_respondents
        states, reasons = new_states(n)
        r = np.full(n, np.nan)
        used = np.zeros(n, dtype=np.int64)
        content = instrument.content_items
        if len(content) < self.min_items:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"fewer than {self.min_items} items other than attention checks",
            )
        elif (problem := self._reference_problem(instrument, reference)) is not None:
            mark(states, reasons, slice(None), State.NOT_ASSESSED, problem)
        else:
            known = np.array([m is not None for m in reference["item_means"]])
            columns = content[known]
            means = np.array([m for m in reference["item_means"] if m is not None])
            self._correlations(instrument, matrix, columns, means, r, used)
            available = len(columns)
            few = used < self.min_items
            for count in np.unique(used[few]).tolist():
                mark(
                    states, reasons, few & (used == count), State.NOT_ASSESSED,
                    "no item answered" if count == 0 else
                    f"answered {count} of the {available} items; {self.min_items} needed",
                )
            undefined = ~few & np.isnan(r)
            mark(
                states, reasons, undefined, State.NOT_ASSESSED,
                "the answers (after reverse keying), or the reference means of the answered "
                "items, do not vary, so their correlation is undefined",
            )
        return self._result(
            instrument,
            scores=-r,
            cutoffs=-float(self.consistency_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "correlation": r,
                "items_used": used,
                "consistency_cutoff": np.full(n, float(self.consistency_cutoff)),
            },
        )

    @staticmethod
    def _correlations(
        instrument: Instrument,
        matrix: ResponseMatrix,
        columns: np.ndarray,
        means: np.ndarray,
        r: np.ndarray,
        used: np.ndarray,
    ) -> None:
        """Fill r and the answered-item counts slice by slice, from five sums per respondent."""
        # r does not change when the means are shifted together; centring them keeps the sums
        # of the means small, so little is lost when the sums are subtracted below.
        m = means - means.mean()
        on_keyed = np.column_stack([np.ones(len(m)), m])
        on_answered = np.column_stack([np.ones(len(m)), m, m * m])
        # One BLAS thread: the products are thin (k by 4,096) and waiting threads would only
        # take processor time from the rest of the screening.
        with one_blas_thread():
            slices = row_slices(matrix.n_respondents)
            for rows, keyed, answered in keyed_slices(
                instrument, matrix, columns, np.float64, slices
            ):
                # Weights on the left: each sum comes out as a contiguous row of n values.
                total, cross = on_keyed.T @ keyed.T
                count, sum_m, sum_mm = on_answered.T @ answered.T
                squares = np.einsum("ij,ij->i", keyed, keyed)
                # Counts, totals and squares are whole numbers, so this spread is exact and
                # zero exactly when the keyed answers do not vary.
                spread = count * squares - total * total
                covariance = count * cross - total * sum_m
                mean_spread = count * sum_mm - sum_m * sum_m
                varies = (spread > 0) & (mean_spread > 1e-12 * count * sum_mm)
                chunk = np.divide(
                    covariance, np.sqrt(spread * mean_spread),
                    out=np.full(len(count), np.nan), where=varies,
                )
                np.clip(chunk, -1.0, 1.0, out=r[rows])
                used[rows] = count

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        r, cutoff = evidence["correlation"], evidence["consistency_cutoff"]
        if r > 0:
            lead = "answers follow the reference sample's item profile"
        elif r < 0:
            lead = "answers run against the reference sample's item profile"
        else:
            lead = "answers do not follow the reference sample's item profile"
        return (
            f"{lead}: r {r:.2f} with the sample's item means over {evidence['items_used']} "
            f"answered items (flagged at {cutoff:.2f} or less)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        r = evidence["correlation"]
        lead = choose(
            r > 0, "answers follow the reference sample's item profile",
            choose(
                r < 0, "answers run against the reference sample's item profile",
                "answers do not follow the reference sample's item profile",
            ),
        )
        return concat(
            lead, ": r ", fixed(r, 2), " with the sample's item means over ",
            plain(evidence["items_used"]), " answered items (flagged at ",
            fixed(evidence["consistency_cutoff"], 2), " or less)",
        )
