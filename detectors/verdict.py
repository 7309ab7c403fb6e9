"""From many detectors' flags to one verdict and one ranking score per respondent.

Multiple hurdles
    Every detector belongs to a family of evidence (invariance, inconsistency, misfit, outlier,
    effort, style). A respondent's verdict counts the families, among those the policy counts
    (all but ``style`` by default), in which at least one detector raised a flag; the cut-offs
    of the calibrated indices are set so that the policy's ``review_rate`` of ordinary
    respondents is flagged in all (``detectors.calibration``):

    - ``likely_careless``: at least ``likely_careless_from`` families (default 2), or a failed
      attention check together with any other counted flag (``failed_check_escalates``);
    - ``review``: at least ``review_from`` families (default 1), or a careless score whose
      combined value lies in the upper ``review_rate * score_review_share`` of the reference's
      unflagged respondents (:func:`score_cutoff`): random answering lowers many indices a
      little and may pass every single cut-off;
    - ``ok``: otherwise.

    Acting only where independent kinds of evidence agree is the "multiple hurdles" advice of
    Curran (2016) and Meade & Craig (2012). The verdict orders a reviewer's work; it is evidence
    for a human decision, not a decision about a person.

Careless score
    A continuous score in [0, 1] that ranks respondents for review.

    1. Each counted detector's score becomes an upper-tail share: the share of the reference
       sample's respondents that no family flags (``detectors.calibration``) scoring at or
       above it, read from ``RANK_POINTS`` quantiles stored with the reference. A fixed
       rule's score counts only once the rule flags (one skipped item is no evidence).
    2. A family's evidence is the geometric mean of its smallest share and of the geometric
       mean of all its shares: one loud index still counts, and several quiet ones that
       agree add up (random answering lowers every consistency and misfit index a little).
       That evidence is ranked among the reference's own, so a family of six indices is not
       six chances to look extreme (the min-p adjustment of Westfall & Young 1993).
    3. The surprise of a family is ``-ln`` of its ranked evidence (about 1 on average for an
       ordinary respondent, 4.6 at 1 in 100); the families' view adds the ``score_families``
       largest (by default all counted families, Fisher's (1925) way of combining
       independent evidence).
    4. The second view is ``GENERAL`` (``content_nonresponsivity``), one test of
       content-blind answering as a whole, kept out of the families' view. Each view is
       ranked among the reference's unflagged respondents and the larger surprise is the
       combined value; the careless score is its percentile in the whole reference: .97 means
       "more suspect than 97% of the reference sample".

    Why this shape, measured on the bfi answers with every careless kind of
    ``detectors.planting`` planted (``tests/benchmarks/bench_judgement.py``): ranking the
    detectors' tails among unflagged respondents lets a kind that fills an index's tail still
    rank above it; counting rules only when they flag removed the noise of one skipped item;
    the min/mean family evidence and the sum over all families ranked the random kinds better
    than the maximum or the sum of the two largest, without losing the loud kinds; the general
    test as a view of its own (rather than one more term of the sum, which diluted it) raised
    the random kinds' ROC AUC from .86-.92 to .93-.97.

References
----------
Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in survey data.
Journal of Experimental Social Psychology, 66, 4-19.

Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
Psychological Methods, 17(3), 437-455.

Fisher, R. A. (1925). Statistical methods for research workers. Edinburgh: Oliver and Boyd.

Westfall, P. H., & Young, S. S. (1993). Resampling-based multiple testing: Examples and
methods for p-value adjustment. New York: Wiley.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._base import DetectorResult, State
from ._registry import REGISTRY
from .instrument import VerdictPolicy

__all__ = [
    "VERDICTS",
    "RANKS_KEY",
    "RANK_POINTS",
    "Verdicts",
    "rank_tables",
    "assess",
    "explain",
]

#: Verdict codes, from least to most suspect.
VERDICTS = ("ok", "review", "likely_careless")
#: Key of the percentile tables inside a stored reference (beside the detectors' own entries).
RANKS_KEY = "careless_score"
#: Quantiles kept per detector: percentiles are resolved to 1/1000 (Heedful's choice).
RANK_POINTS = 1001
#: Key of the combined value's table among the percentile tables.
COMBINED = "(combined)"
#: Prefix of a family's table of family evidence shares among the percentile tables.
FAMILY_PREFIX = "(family) "
#: Key of the table of the families' combined value (read among unflagged respondents).
FAMILIES_KEY = "(families)"
#: Key of the table of the combined value among the reference's unflagged respondents, from
#: which the careless score's own review hurdle is read.
UNFLAGGED_KEY = "(combined, unflagged)"
#: The attention-check detector whose failure escalates the verdict.
ATTENTION = "attention_checks"
#: The single test of content-blind answering as a whole, the careless score's second view.
GENERAL = "content_nonresponsivity"


def _quantiles(values: np.ndarray) -> list[float] | None:
    values = values[np.isfinite(values)]
    if len(values) == 0:
        return None
    probabilities = np.linspace(0.0, 1.0, RANK_POINTS)
    return [float(v) for v in np.quantile(values, probabilities, method="inverted_cdf")]


def rank_tables(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    unflagged: np.ndarray | None = None,
) -> dict[str, list[float]]:
    """Quantiles (JSON-ready) read from a reference sample: of each counted detector's
    assessed scores, under ``FAMILY_PREFIX + family`` of each family's evidence share,
    and under ``COMBINED`` of the combined value, so that the careless score itself is a
    percentile of the reference. Detectors that assessed nobody get no table.

    ``unflagged`` marks the reference respondents that no counted family flags at the
    calibrated cut-offs (``detectors.calibration``); the detectors' and families' tables are
    read from them, so that careless respondents in the reference do not fill the tails: a
    respondent beyond a cut-off then lies beyond (nearly) the whole table. The combined table
    is read from the whole reference, so the careless score stays a percentile of it."""
    n = next((len(r) for r in results.values() if r is not None), 0)
    keep_all = np.ones(n, dtype=bool) if unflagged is None else unflagged
    tables: dict[str, list[float]] = {}
    for name, result in results.items():
        if result is None or result.family not in policy.families:
            continue
        table = _quantiles(result.scores[keep_all & (result.states == State.ASSESSED)])
        if table is not None:
            tables[name] = table
    for family, smallest in _family_shares(policy, results, tables, n).items():
        table = _quantiles(smallest[keep_all])
        if table is not None:
            tables[FAMILY_PREFIX + family] = table
    table = _quantiles(_family_sum(policy, results, tables, n)[keep_all])
    if table is not None:
        tables[FAMILIES_KEY] = table
    combined = _combine(policy, results, tables, n)
    table = _quantiles(combined)
    if table is not None:
        tables[COMBINED] = table
    table = _quantiles(combined[keep_all])
    if table is not None:
        tables[UNFLAGGED_KEY] = table
    return tables


#: Bins of the lookup that places scores among a table's values (:func:`_distinct_below`):
#: 2^16 leaves at most one or two of a table's 1,001 values in a bin unless a long tail
#: squeezes them together.
_BINS = 1 << 16
#: Table values a bin may hold before its scores are placed by binary search instead.
_BIN_VALUES = 4


def _percentiles(scores: np.ndarray, table: list[float]) -> np.ndarray:
    """Mid-rank percentiles of ``scores`` in a sorted table, (#below + #at-or-below) / 2N.

    Both counts come from the table's distinct values: with j of them below a score
    (:func:`_distinct_below`), #below is where the (j+1)-th distinct value first appears in
    the table, and #at-or-below where the one after it does when the score equals it."""
    grid = np.asarray(table, dtype=np.float64)
    values = np.asarray(scores, dtype=np.float64)
    distinct, first = np.unique(grid, return_index=True)
    bounds = np.append(first, len(grid))
    below = _distinct_below(distinct, values)
    equal = np.append(distinct, np.nan)[below] == values
    out = (bounds[below] + bounds[below + equal]) / (2.0 * len(grid))
    out[~np.isfinite(values)] = np.nan
    return out


def _distinct_below(distinct: np.ndarray, values: np.ndarray) -> np.ndarray:
    """How many of the sorted, distinct table values lie below each value: the same as
    ``np.searchsorted(distinct, values, side="left")``, without a binary search per value.

    The table's values are spread over ``_BINS`` equal bins between the smallest and the
    largest by one monotone mapping (shift, scale, clip, truncate), applied alike to the
    values. A table value in a lower bin than a value lies below it and one in a higher bin
    above it, so the count is the table values before the value's bin plus those of its own
    bin below it, a comparison or two; a bin holding more than ``_BIN_VALUES`` table values
    (a long tail squeezing the rest together) is searched the usual way.
    """
    low, high = float(distinct[0]), float(distinct[-1])
    with np.errstate(over="ignore", divide="ignore"):
        scale = (_BINS - 1) / (high - low) if high > low else np.inf
    if len(values) < _BINS or not (np.isfinite(low) and np.isfinite(high) and np.isfinite(scale)):
        return np.searchsorted(distinct, values, side="left")

    def bin_of(x: np.ndarray) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore"):
            position = (x - low) * scale
        np.clip(position, 0, _BINS - 1, out=position)
        position[np.isnan(position)] = _BINS - 1
        return position.astype(np.intp)

    starts = np.searchsorted(bin_of(distinct), np.arange(_BINS + 1), side="left")
    held = np.diff(starts)
    bins = bin_of(values)
    # +inf after the table, so that looking past a bin's last value compares False; a NaN
    # compares False throughout and counts every value before the last bin (set right below).
    padded = np.concatenate([distinct, np.full(_BIN_VALUES, np.inf)])
    where = starts.astype(np.int32)[bins]
    count = where.astype(np.intp)
    for offset in range(min(int(held.max()), _BIN_VALUES)):
        count += padded[where + offset] < values
    if held.max() > _BIN_VALUES:
        crowded = np.flatnonzero(held[bins] > _BIN_VALUES)
        count[crowded] = np.searchsorted(distinct, values[crowded], side="left")
    count[np.isnan(values)] = len(distinct)  # NaN sorts after every number
    return count


@dataclass(frozen=True, eq=False)
class Verdicts:
    """The verdict, careless score and flagging families of every respondent."""

    #: Verdict codes (``VERDICTS``) as an object array of str.
    verdict: np.ndarray
    #: In [0, 1]; NaN where no counted detector assessed the respondent or no ranks exist.
    careless_score: np.ndarray
    #: Counted families, in policy order.
    families: tuple[str, ...]
    #: bool (respondents, families): which counted families flagged the respondent.
    family_flags: np.ndarray
    #: bool: the careless score alone reached the review hurdle (:func:`score_cutoff`).
    by_score: np.ndarray | None = None
    #: Upper share of the reference's unflagged respondents the score hurdle sends to review.
    score_share: float = 0.0
    #: Flagging families from which the verdict is ``likely_careless`` (the policy's).
    likely_from: int = 2

    def flagging_families(self, i: int) -> list[str]:
        return [self.families[f] for f in np.flatnonzero(self.family_flags[i])]

    def reason(self, i: int) -> str:
        """Why respondent ``i`` has their verdict, in one sentence (:func:`explain`)."""
        return explain(
            str(self.verdict[i]), self.flagging_families(i), float(self.careless_score[i]),
            self.score_share, None if self.by_score is None else bool(self.by_score[i]),
            self.likely_from,
        )


def explain(
    verdict: str,
    families: Sequence[str],
    careless_score: float | None,
    score_share: float,
    by_score: bool | None = None,
    likely_from: int = 2,
) -> str:
    """One sentence on why a respondent has ``verdict``: the counted families that flagged
    them, whether a failed attention check escalated it (``likely_careless`` with fewer than
    ``likely_from`` families), and whether the careless score alone reached the review
    hurdle (``by_score``; when unknown, as for a stored result, a verdict other than ``ok``
    without a flagging family can only have come from it)."""
    if by_score is None:
        by_score = verdict != "ok" and not families
    if not families and not by_score:
        return "no counted family flagged and the careless score is below the review hurdle"
    parts = []
    if families:
        plural = "family" if len(families) == 1 else "families"
        parts.append(f"flagged by {len(families)} {plural} ({', '.join(families)})")
        if verdict == "likely_careless" and len(families) < likely_from:
            parts.append("a failed attention check with another flag makes careless answering likely")
    if by_score:
        shown = "unknown" if careless_score is None or careless_score != careless_score else (
            f"{careless_score:.3f}"
        )
        parts.append(
            f"careless score {shown}: the combined evidence lies in the upper {score_share:.1%} "
            "of the reference's unflagged respondents, though no single index may reach its "
            "cut-off"
        )
    return "; ".join(parts)


def assess(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    ranks: Mapping[str, list[float]] | None,
    n: int,
) -> Verdicts:
    """Verdicts and careless scores of ``n`` respondents from their detector results.

    Parameters
    ----------
    policy : VerdictPolicy
        The instrument's verdict policy.
    results : mapping of detector name to DetectorResult (or None for a detector that could
        not run, e.g. a sample-based one without a reference)
    ranks : mapping, optional
        Percentile tables from :func:`rank_tables`; without them the careless score is NaN.
    n : int
        Number of respondents.
    """
    families = tuple(policy.families)
    family_flags = np.zeros((n, len(families)), dtype=bool)
    attention = np.zeros(n, dtype=bool)
    counted_flags = np.zeros(n, dtype=np.int64)
    for name, result in results.items():
        if result is None or result.family not in families:
            continue
        family_flags[:, families.index(result.family)] |= result.flags
        counted_flags += result.flags
        if name == ATTENTION:
            attention |= result.flags
    flagged_families = family_flags.sum(axis=1)
    likely = flagged_families >= policy.likely_careless_from
    if policy.failed_check_escalates:
        likely |= attention & (counted_flags >= 2)
    review = flagged_families >= policy.review_from
    by_score = np.zeros(n, dtype=bool)
    if ranks and COMBINED in ranks:
        combined = _combine(policy, results, ranks, n)
        careless = _percentiles(combined, ranks[COMBINED])
        by_score = combined >= score_cutoff(policy, ranks)
        review |= by_score
    else:
        careless = np.full(n, np.nan)
    codes = np.where(likely, 2, np.where(review, 1, 0))
    verdict = np.asarray(VERDICTS, dtype=object)[codes]
    share = policy.review_rate * policy.score_review_share
    return Verdicts(
        verdict, careless, families, family_flags, by_score, share, policy.likely_careless_from
    )


def score_cutoff(policy: VerdictPolicy, ranks: Mapping[str, list[float]]) -> float:
    """The combined value from which the careless score alone sends a respondent to review:
    the upper ``review_rate * score_review_share`` quantile of the reference's unflagged
    respondents (infinite when the share is 0 or the reference has no such table)."""
    share = policy.review_rate * policy.score_review_share
    table = ranks.get(UNFLAGGED_KEY)
    if share <= 0 or not table:
        return float("inf")
    grid = np.asarray(table, dtype=np.float64)
    return float(grid[min(len(grid) - 1, int(np.ceil((1.0 - share) * (len(grid) - 1))))])


def _family_shares(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    ranks: Mapping[str, list[float]],
    n: int,
) -> dict[str, np.ndarray]:
    """Per counted family, each respondent's evidence as a share (small = rare): the geometric
    mean of the smallest upper-tail share among the family's detectors (the share of the
    reference scoring at or above the respondent) and of the geometric mean of all of them.
    Half the strongest index and half their average: one loud index still counts, and several
    quiet ones that agree (as random answering makes them) add up. NaN where none assessed.

    A fixed rule's score below its cut-off is no evidence (one skipped item, one grid answered
    alike): its share is 1 until the rule flags."""
    out: dict[str, np.ndarray] = {}
    logs: dict[str, list[np.ndarray]] = {}
    for name, result in results.items():
        if result is None or result.family not in policy.families or name not in ranks:
            continue
        if name == GENERAL and FAMILIES_KEY in ranks:
            continue  # the careless score's other view (:func:`_combine`)
        if REGISTRY.get(name) is not None and REGISTRY[name].calibration == "fixed":
            # a rule's score below its cut-off is no evidence (one skipped item, one grid
            # answered alike): it counts only once the rule flags (looked up for those alone)
            share = np.where(np.isnan(result.scores), np.nan, 1.0)
            flagged = np.flatnonzero(result.flags)
            share[flagged] = 1.0 - _percentiles(result.scores[flagged], ranks[name])
        else:
            share = 1.0 - _percentiles(result.scores, ranks[name])
        logs.setdefault(result.family, []).append(
            np.log(np.maximum(share, 1.0 / (2 * RANK_POINTS)))
        )
    for family, values in logs.items():
        stack = np.vstack(values)
        present = ~np.isnan(stack)
        some = present.any(axis=0)
        smallest = np.where(present, stack, np.inf).min(axis=0)
        mean = np.where(present, stack, 0.0).sum(axis=0) / np.maximum(present.sum(axis=0), 1)
        out[family] = np.where(some, np.exp(0.5 * smallest + 0.5 * mean), np.nan)
    return out


def _combine(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    ranks: Mapping[str, list[float]],
    n: int,
) -> np.ndarray:
    """The larger surprise of the careless score's two views: the families' sum
    (:func:`_family_sum`) and the general test of content-blind answering (``GENERAL``), each
    as ``-ln`` of its upper-tail share among the reference's unflagged respondents. A
    reference from before the general test (no ``FAMILIES_KEY`` table) keeps the sum alone."""
    families = _family_sum(policy, results, ranks, n)
    if FAMILIES_KEY not in ranks:
        return families
    combined = surprise(1.0 - _percentiles(families, ranks[FAMILIES_KEY]))
    general = results.get(GENERAL)
    if general is not None and GENERAL in ranks and general.family in policy.families:
        alone = surprise(1.0 - _percentiles(general.scores, ranks[GENERAL]))
        combined = np.fmax(combined, alone)
    return combined


def _family_sum(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    ranks: Mapping[str, list[float]],
    n: int,
) -> np.ndarray:
    """Sum of the ``score_families`` largest family surprises: ``-ln`` of each family's
    evidence share (:func:`_family_shares`) ranked among the reference's."""
    families = tuple(policy.families)
    adjusted = np.full((n, len(families)), np.nan)
    for family, smallest in _family_shares(policy, results, ranks, n).items():
        table = ranks.get(FAMILY_PREFIX + family)
        if table is None:
            continue
        adjusted[:, families.index(family)] = _percentiles(smallest, table)
    return _top_sum(surprise(adjusted), policy.score_families)


def surprise(shares: np.ndarray) -> np.ndarray:
    """``-ln(p)`` of a lower-tail share p (small p = rare), with p kept at or above the
    resolution of the percentile tables; NaN stays NaN."""
    floor = 1.0 / (2 * RANK_POINTS)
    with np.errstate(invalid="ignore"):
        return -np.log(np.maximum(shares, floor))


def _top_sum(values: np.ndarray, top: int) -> np.ndarray:
    """Row sums of the ``top`` largest non-NaN values; NaN where a row has none."""
    present = ~np.isnan(values)
    ordered = np.sort(np.where(present, values, -np.inf), axis=1)[:, ::-1][:, :top]
    total = np.where(np.isfinite(ordered), ordered, 0.0).sum(axis=1)
    return np.where(present.any(axis=1), total, np.nan)


def reference_ranks(reference: Mapping[str, Any] | None) -> Mapping[str, list[float]] | None:
    """The percentile tables stored in a reference, if any."""
    if not reference:
        return None
    return reference.get(RANKS_KEY)
