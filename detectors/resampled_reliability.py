"""Resampled individual reliability: do random halves of each scale agree within the respondent?"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, new_states, one_blas_thread, row_slices
from ._text import TextColumn, choose, concat, fixed, plain
from .even_odd import mark_unjudged, spearman_brown, splittable_scales
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["ResampledReliability", "split_halves"]


class ResampledReliability(Detector):
    """Resampled individual reliability: even-odd consistency averaged over many half-splits.

    Every scale with at least ``min_scale_items`` items (attention checks left out) is cut into
    two halves ``splits`` times; the cuts are a property of the instrument, the same for every
    respondent. Split 1 is the odd/even cut of ``even_odd`` (1st, 3rd, ... item of the scale
    against 2nd, 4th, ...); every further split puts a random ceil(m / 2) of the scale's m items
    in the first half (``numpy.random.default_rng(split_seed)``, so results are reproducible).
    Answers are reverse keyed where the item is keyed -1 (x' = (lowest + highest) - x). For
    split s, the respondent's first-half mean x_c and second-half mean y_c of every scale c are
    taken over the answered items; across the scales where both halves have an answer::

        r_s         = Pearson correlation of (x_c) and (y_c) over the scales
        r_mean      = mean of r_s over the splits where r_s is defined
        reliability = 2 r_mean / (1 + r_mean)        (Spearman-Brown, clipped below at -1)

    The score is **the negative of r_mean** (higher = more suspect): it orders respondents as
    the reliability does, without the ties that clipping at -1 makes among respondents whose
    halves disagree (r_mean <= -1/3), so a cut-off calibrated from a sample can fall between
    them. A respondent is flagged when the reliability is at or below ``reliability_cutoff``,
    that is when r_mean is at or below ``reliability_cutoff / (2 - reliability_cutoff)``.

    The split correlations are averaged **before** the Spearman-Brown step-up. The step-up is
    concave and runs to minus infinity as r approaches -1 (it is clipped at -1), so averaging
    stepped-up values would let a few splits with r near -1 pull the mean down and the clipping
    bias it; the mean r estimates the respondent's expected half-length agreement, and one
    step-up turns it into the full-length reliability on the same footing as ``even_odd``. With
    ``splits=1`` the index equals ``even_odd``.

    Parameters
    ----------
    reliability_cutoff : float in [-1, 1], default 0.3
        Fallback cut-off: flag when the reliability is at or below this value. The index's
        null distribution depends on the instrument (number and length of scales) and the
        sample, so the screen replaces this by a quantile of a reference sample
        (``calibration = "reference"``) unless it is set explicitly. About .30 is a cut-off in
        common use for even-odd consistency (from memory, not checked in a source); the
        fallback follows it so that the two indices read alike.
    splits : int in [1, 200], default 10
        Number of half-splits. The gain from averaging levels off quickly; measured ROC AUC
        against uniform random answering (simulation of Notes, 6 scales of 6 items):
        .839 (1 split), .892 (5), .901 (10), .904 (20), .906 (50); on the bfi data with
        planted random respondents .848 (1), .874 (10), .879 (50). The cost grows in
        proportion to ``splits``; 10 keeps a million respondents near a second. At most 200:
        beyond 50 the measured gain is nil and memory grows with the number of splits.
    split_seed : int >= 0, default 0
        Seed of the random splits. Raising ``splits`` keeps the earlier splits unchanged.
    min_scales : int >= 3, default 4
        The index applies to an instrument only with at least this many scales of
        ``min_scale_items`` items, and a respondent is assessed only with at least this many
        scales with both halves answered. Derived by measurement (Notes): with fewer than 4
        scales of typical length the index does not reach a ROC AUC of .80 against random
        answering.
    min_scale_items : int >= 2, default 4
        Only scales with at least this many items take part, so each half has two items or
        more; a summed scale wants at least 4 items (common practice, no source).

    Notes
    -----
    **How many scales.** A correlation over a handful of points is noisy, so the index knows
    when it cannot judge. Simulated ordinary respondents (``tests/benchmarks/
    split_half_scales.py``): one standard normal trait per scale, answer =
    round(midpoint + 0.85 * keying * trait + e), e normal with SD 1.15, clipped to the range,
    keying alternating within the scale (inter-item r about .35 and item SD about 1.4, as in
    the bfi data); 10,000 of them against 10,000 uniform random respondents. ROC AUC with
    1 split (``even_odd``) and 10 splits:

    ===========================  =====  =====  =====  =====  =====  =====  =====
    scales                         3      4      5      6      8     10     12
    ===========================  =====  =====  =====  =====  =====  =====  =====
    5 items, 6 points, 1 split    .691   .748   .779   .809   .858   .895   .918
    5 items, 6 points, 10         .756   .810   .846   .874   .916   .946   .960
    6 items, 5 points, 1 split    .706   .758   .805   .839   .882   .913   .937
    6 items, 5 points, 10         .774   .829   .873   .901   .938   .958   .976
    4 items, 5 points, 1 split    .669   .715   .751   .782   .828   .864   .889
    4 items, 5 points, 10         .718   .767   .810   .836   .881   .913   .932
    10 items, 5 points, 1 split   .754   .822   .867   .895   .939   .960   .976
    10 items, 5 points, 10        .838   .896   .935   .953   .977   .989   .994
    ===========================  =====  =====  =====  =====  =====  =====  =====

    Heedful asks for an AUC of at least .80 (the usual lower bound of "excellent"
    discrimination, from memory) on scales of both 5 and 6 items: 4 scales for this index, 6
    for ``even_odd``. Below that, a fifth or more of the simulated attentive respondents fall
    under the .30 cut-off. On 4-item scales the same level needs 5 scales (``even_odd``: 8),
    on 10-item scales 3 (``even_odd``: 4); set ``min_scales`` accordingly. On the real bfi
    data (5 scales of 5 items, 200 planted uniform random respondents) the observed AUCs,
    .848 (1 split) and .874 (10), lie above the simulated .779 and .846: the model, with no
    differences between item means, errs on the cautious side.

    Attentive respondents with flat profiles (every scale near the same level) have half
    means that hardly vary across scales, so their correlation is low or undefined: a flag
    then reflects a flat profile rather than inconsistency, which the evidence shows. A
    respondent answering one option throughout on uniformly keyed scales has halves that do
    not vary (not assessed) and is caught by ``straightlining`` and ``long_string``.

    Not applicable: fewer than ``min_scales`` scales of ``min_scale_items`` items. Not
    assessed: fewer than ``min_scales`` scales with both halves answered in every split, or
    halves that do not vary across scales in any split.

    References
    ----------
    Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in survey
    data. Journal of Experimental Social Psychology, 66, 4-19.

    Johnson, J. A. (2005). Ascertaining the validity of individual protocols from Web-based
    personality inventories. Journal of Research in Personality, 39(1), 103-129.

    Brown, W. (1910). Some experimental results in the correlation of mental abilities.
    British Journal of Psychology, 3(3), 296-322. (Details from memory, not checked.)

    Spearman, C. (1910). Correlation calculated from faulty data. British Journal of
    Psychology, 3(3), 271-295. (Details from memory, not checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"{s}{i}", "scale": s} for s in "abcd" for i in range(1, 5)]})
    >>> answers = np.array([
    ...     [4, 5, 4, 5, 2, 1, 2, 2, 3, 3, 4, 3, 5, 5, 4, 5],
    ...     [5, 1, 2, 4, 1, 5, 3, 2, 4, 4, 1, 2, 2, 5, 1, 3]])
    >>> result = ResampledReliability().screen(
    ...     instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> # The 2nd answers every scale at the same mean level, so its halves mirror each other.
    >>> result.scores.round(6).tolist(), result.flags.tolist()
    ([-0.93926, 0.96656], [False, True])
    >>> result.sentence_for(1)
    'random halves of the scales disagree: mean r -0.97 over 10 half-splits of 4 scales (SD 0.02 \
between splits), reliability -1.00 after Spearman-Brown (flagged at 0.30 or less)'
    """

    name = "resampled_reliability"
    family = "inconsistency"
    summary = "Within-person agreement of random half-scales across scales, over many splits."
    reference = (
        "Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in "
        "survey data. Journal of Experimental Social Psychology, 66, 4-19."
    )
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "reliability_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return spearman_brown(-cutoffs)  # the score is minus the mean split correlation
    parameter_constraints = {
        "reliability_cutoff": Interval(float, -1, 1),
        "splits": Interval(int, 1, 200),
        "split_seed": Interval(int, 0, None),
        "min_scales": Interval(int, 3, None),
        "min_scale_items": Interval(int, 2, None),
    }

    def __init__(
        self,
        *,
        reliability_cutoff: float = 0.3,
        splits: int = 10,
        split_seed: int = 0,
        min_scales: int = 4,
        min_scale_items: int = 4,
    ):
        self.reliability_cutoff = reliability_cutoff
        self.splits = splits
        self.split_seed = split_seed
        self.min_scales = min_scales
        self.min_scale_items = min_scale_items

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        scales = splittable_scales(
            instrument, self.min_scales, self.min_scale_items, states, reasons
        )
        mean_r = np.full(n, np.nan)
        spread = np.full(n, np.nan)
        splits_used = np.zeros(n, dtype=np.int64)
        scales_used = np.zeros(n, dtype=np.int64)
        if scales:
            halves = split_halves([len(c) for c in scales], self.splits, self.split_seed)
            # Small products: threads cost more than they save.
            with one_blas_thread():
                for rows in row_slices(n):
                    r, used = split_correlations(
                        instrument, matrix, rows, scales, halves, self.min_scales
                    )
                    defined = ~np.isnan(r)
                    count = defined.sum(axis=1)
                    r[~defined] = 0.0
                    safe = np.maximum(count, 1)
                    mean = r.sum(axis=1) / safe
                    r *= r
                    # r lies in [-1, 1], so the one-pass variance loses nothing that matters.
                    variance = np.maximum(r.sum(axis=1) / safe - mean * mean, 0.0)
                    some = count > 0
                    mean_r[rows] = np.where(some, mean, np.nan)
                    spread[rows] = np.where(some, np.sqrt(variance), np.nan)
                    splits_used[rows] = count
                    scales_used[rows] = used.max(axis=1)
            mark_unjudged(states, reasons, mean_r, scales_used, self.min_scales)
        reliability = spearman_brown(mean_r)
        cutoff = float(self.reliability_cutoff)
        return self._result(
            instrument,
            scores=-mean_r,
            cutoffs=-cutoff / (2.0 - cutoff),  # Spearman-Brown inverted: r = R / (2 - R)
            states=states,
            reasons=reasons,
            evidence={
                "mean_correlation": mean_r,
                "correlation_spread": spread,
                "reliability": np.where(np.isnan(mean_r), np.nan, reliability),
                "splits_used": splits_used,
                "scales_used": scales_used,
                "reliability_cutoff": np.full(n, float(self.reliability_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        reliability, cutoff = evidence["reliability"], evidence["reliability_cutoff"]
        verb = "disagree" if reliability <= cutoff else "agree"
        return (
            f"random halves of the scales {verb}: mean r {evidence['mean_correlation']:.2f} over "
            f"{evidence['splits_used']} half-splits of {evidence['scales_used']} scales (SD "
            f"{evidence['correlation_spread']:.2f} between splits), reliability "
            f"{reliability:.2f} after Spearman-Brown (flagged at {cutoff:.2f} or less)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        reliability, cutoff = evidence["reliability"], evidence["reliability_cutoff"]
        return concat(
            "random halves of the scales ", choose(reliability <= cutoff, "disagree", "agree"),
            ": mean r ", fixed(evidence["mean_correlation"], 2), " over ",
            plain(evidence["splits_used"]), " half-splits of ", plain(evidence["scales_used"]),
            " scales (SD ", fixed(evidence["correlation_spread"], 2),
            " between splits), reliability ", fixed(reliability, 2),
            " after Spearman-Brown (flagged at ", fixed(cutoff, 2), " or less)",
        )


def split_halves(sizes: list[int], splits: int, seed: int) -> list[np.ndarray]:
    """Which items of each scale form the first half, per split: one (size, splits) bool array
    per scale.

    Split 0 is the odd/even split (1st, 3rd, ... item in the first half); every further split
    puts a random ceil(size / 2) of each scale's items in the first half, drawn from
    ``numpy.random.default_rng(seed)`` split by split and scale by scale, so a larger
    ``splits`` keeps the earlier splits unchanged.
    """
    rng = np.random.default_rng(seed)
    halves = [np.zeros((size, splits), dtype=bool) for size in sizes]
    for half in halves:
        half[0::2, 0] = True
    for s in range(1, splits):
        for size, half in zip(sizes, halves, strict=True):
            half[rng.permutation(size)[: (size + 1) // 2], s] = True
    return halves


def split_correlations(
    instrument: Instrument,
    matrix: ResponseMatrix,
    rows: slice,
    scales: list[np.ndarray],
    halves: list[np.ndarray],
    min_scales: int = 2,
) -> tuple[np.ndarray, np.ndarray]:
    """Per respondent of ``rows`` and per split: the Pearson r across scales of the two half
    means (NaN where it is undefined or fewer than ``min_scales`` scales have both halves
    answered), and the number of scales with both halves answered.

    A half mean is the mean of the answered keyed items of the half. Respondents who answered
    the whole scale get both half means of every split from one matrix product with fixed
    weights (1 / half size); the few with a gap in the scale get answered sums divided by
    answered counts, both also matrix products.
    """
    columns = np.concatenate(scales)
    raw = matrix.answers[rows][:, columns]
    answered = raw != MISSING
    flip = instrument.lowest[columns].astype(np.float64) + instrument.highest[columns]
    reverse = instrument.keyed[columns] == -1
    # One shift for every item leaves r unchanged and keeps the one-pass sums well conditioned.
    centre = flip.mean() / 2
    values = raw * np.where(reverse, -1.0, 1.0) + (np.where(reverse, flip, 0.0) - centre)
    values[~answered] = 0.0
    n, splits = len(raw), halves[0].shape[1]
    count = np.full((n, splits), len(scales), dtype=np.int64)
    sum_x, sum_y, sum_xx, sum_yy, sum_xy = (np.zeros((n, splits)) for _ in range(5))
    start = 0
    for half in halves:
        stop = start + len(half)
        block = values[:, start:stop]
        first = half.astype(np.float64)
        second = 1.0 - first
        x = block @ (first / first.sum(axis=0))
        y = block @ (second / second.sum(axis=0))
        gaps = np.flatnonzero(~answered[:, start:stop].all(axis=1))
        if len(gaps):
            part, seen = block[gaps], answered[gaps, start:stop].astype(np.float64)
            # A skipped answer is 0 in part, so an empty half has sum 0 and count 0.
            sum_first, n_first = part @ first, seen @ first
            sum_second, n_second = part @ second, seen @ second
            usable = (n_first > 0) & (n_second > 0)
            x[gaps] = sum_first / np.maximum(n_first, 1) * usable
            y[gaps] = sum_second / np.maximum(n_second, 1) * usable
            count[gaps] -= ~usable
        sum_x += x
        sum_y += y
        sum_xy += x * y
        x *= x
        y *= y
        sum_xx += x
        sum_yy += y
        start = stop
    safe = np.maximum(count, 1)
    cxx = sum_xx - sum_x * sum_x / safe
    cyy = sum_yy - sum_y * sum_y / safe
    cxy = sum_xy - sum_x * sum_y / safe
    # Sums of squares at rounding level count as no variation.
    varies = (cxx > 1e-12) & (cyy > 1e-12) & (count >= max(min_scales, 2))
    denominator = np.sqrt(np.where(varies, cxx * cyy, 1.0))
    r = np.divide(cxy, denominator, out=np.full(cxy.shape, np.nan), where=varies)
    return np.clip(r, -1.0, 1.0), count
