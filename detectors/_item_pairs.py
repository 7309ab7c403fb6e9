"""Shared machinery of the item-pair consistency indices (psychometric synonyms and antonyms).

The reference sample's inter-item correlations choose the pairs; each respondent is then
judged by the within-person correlation of first and second members across those pairs.
``synonym_consistency`` and ``antonym_consistency`` differ only in the direction of the pairs,
their defaults and their wording.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any, ClassVar

import numpy as np

from ._base import (
    Detector,
    DetectorResult,
    Interval,
    Options,
    State,
    mark,
    new_states,
    one_blas_thread,
    row_slices,
)
from ._text import TextColumn, concat, fixed, plain
from .even_odd import _pearson_rows
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["ItemPairConsistency", "SHARED_CONSTRAINTS", "item_correlations", "settings_init"]

#: Items named in a reason before "and N more".
_ITEMS_NAMED = 6


def item_correlations(
    instrument: Instrument, matrix: ResponseMatrix, columns: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Pairwise-complete Pearson correlations of ``columns`` and the respondents behind each.

    Every entry uses the respondents who answered both items, as ``pandas.DataFrame.corr``
    does. With X the answers shifted to start at 0 (0 where missing) and M the answered mask,
    the sums over the respondents who answered both i and j are matrix products: counts M'M,
    sums of x_i X'M, of x_i² (X∘X)'M, of x_i x_j X'X. The answers are small integers, so every
    sum is exact in float64 (below 2**53) and the result does not depend on the order of the
    respondents. Returns (r, counts), both (k, k); r is NaN where an item does not vary among
    the respondents who answered both, or fewer than two did.
    """
    k = len(columns)
    lowest = instrument.lowest[columns].astype(np.float64)
    counts = np.zeros((k, k))
    sums = np.zeros((k, k))
    squares = np.zeros((k, k))
    products = np.zeros((k, k))
    # One BLAS thread: the products are small, and threads waiting between them only take
    # processor time from the rest of the screening.
    with one_blas_thread():
        for rows in row_slices(matrix.n_respondents):
            raw = matrix.answers[rows][:, columns]
            answered = (raw != MISSING).astype(np.float64)
            shifted = (raw - lowest) * answered
            counts += answered.T @ answered
            sums += shifted.T @ answered
            squares += (shifted * shifted).T @ answered
            products += shifted.T @ shifted
    covariance = counts * products - sums * sums.T
    variance = counts * squares - sums * sums
    denominator = np.sqrt(variance * variance.T)
    usable = (variance > 0) & (variance.T > 0) & (counts >= 2)
    r = np.divide(covariance, denominator, out=np.full((k, k), np.nan), where=usable)
    return np.clip(r, -1.0, 1.0), counts.astype(np.int64)


def _item_list(names: list[str]) -> str:
    if len(names) > _ITEMS_NAMED:
        shown = names[: _ITEMS_NAMED - 1]
        return f"{', '.join(shown)} and {len(names) - len(shown)} more"
    return ", ".join(names)


#: Constraints of the settings both indices share; each adds its own ``pair_threshold``.
SHARED_CONSTRAINTS: dict[str, Interval | Options] = {
    "consistency_cutoff": Interval(float, -1, 1),
    "min_pairs": Interval(int, 3, None),
    "min_pair_respondents": Interval(int, 3, None),
    "pairing": Options(("all", "disjoint")),
}


def settings_init(default_threshold: float) -> Callable[..., None]:
    """The keyword-only ``__init__`` of a pair index, with its own default ``pair_threshold``
    and the shared defaults (documented in :class:`ItemPairConsistency`)."""

    def __init__(
        self: ItemPairConsistency,
        *,
        pair_threshold: float = default_threshold,
        consistency_cutoff: float = 0.0,
        min_pairs: int = 3,
        min_pair_respondents: int = 100,
        pairing: str = "all",
    ) -> None:
        self.pair_threshold = pair_threshold
        self.consistency_cutoff = consistency_cutoff
        self.min_pairs = min_pairs
        self.min_pair_respondents = min_pair_respondents
        self.pairing = pairing

    return __init__


class ItemPairConsistency(Detector):
    """Within-person consistency across item pairs chosen in a reference sample.

    The pairs are content items (attention checks left out) whose Pearson correlation in the
    reference sample is beyond ``pair_threshold``: above it for psychometric synonyms
    (``synonym_consistency``), below it (a negative number) for antonyms
    (``antonym_consistency``). The correlations are pairwise complete (each pair uses the
    respondents who answered both, as :func:`item_correlations` computes them) and use
    **raw** answers, so keying needs no attention: its effect shows in the sign.

    For each respondent, the answers to the first members of the pairs (the earlier item in
    presentation order) and to the second members form two vectors over the pairs both of
    whose items they answered; their Pearson correlation r is the index::

        r = sum (a_p - mean a) (b_p - mean b) / sqrt(sum (a_p - mean a)² sum (b_p - mean b)²)

    The pairs are chosen once from a reference sample (``fit``; the service keeps one per
    survey) and stored with their correlations, the number of respondents behind each and the
    settings used, as a JSON-ready dict. Subclasses set ``direction``, the default threshold
    and the wording.

    Parameters
    ----------
    pair_threshold : float
        Documented by each index (default .60 for synonyms, -.60 for antonyms).
    consistency_cutoff : float in [-1, 1], default 0.0
        The within-person r at which a respondent is flagged (at or below it for synonyms, at
        or above it for antonyms). Heedful's choice; no published cut-off is known to us.
        r = 0 means no consistency at all across pairs the sample answers alike (or
        oppositely), which attentive respondents rarely show once there are a few pairs; look
        at the sample's distribution before relying on it.
    min_pairs : int >= 3, default 3
        The index applies only when the reference has at least this many pairs, and a
        respondent is assessed only with both items of at least this many pairs answered: a
        correlation over two points is always +1 or -1.
    min_pair_respondents : int >= 3, default 100
        A pair is a candidate only when at least this many respondents of the reference sample
        answered both its items. Heedful's choice: at 100 the standard error of a correlation
        on Fisher's z scale, 1 / sqrt(n - 3), is about 0.10 (common practice, no source), so a
        pair whose true correlation is .45 passes .60 by chance about 2% of the time.
    pairing : {"all", "disjoint"}, default "all"
        ``"all"`` keeps every pair beyond the threshold, so an item may belong to several pairs
        (three items that all correlate give three pairs). ``"disjoint"`` keeps the strongest
        pair first and then only pairs whose items are still unused, so each item counts once
        and the pairs are less dependent. Heedful keeps all pairs by default, the common
        reading of the procedure (from memory): on instruments with few strong pairs it keeps
        more of them.

    Notes
    -----
    The index stops being informative when the instrument has few strongly correlated pairs
    (short or heterogeneous questionnaires: not applicable below ``min_pairs``, with the count
    in the reason; the threshold is never moved silently), when the reference sample is small
    or itself full of careless respondents (weaker correlations choose the pairs), and for a
    respondent whose answers to the first (or second) members do not vary, e.g. one answer
    throughout: r is undefined and the respondent is not assessed (``straightlining`` and
    ``long_string`` judge that case). With few pairs r is very noisy (a correlation over three
    to five points), so a flag on a short list of pairs is weak evidence; like every flag it
    is a reason for a human to look at the response, not a verdict on the respondent.

    Not applicable: fewer than 2 content items, or fewer than ``min_pairs`` pairs in the
    reference. Not assessed: the reference could not choose pairs (too few respondents), was
    estimated with other settings or on other items, or the respondent answered too few pairs
    or gave invariant answers.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.
    """

    family = "inconsistency"
    needs_sample = True
    reference = (
        "Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data. "
        "Psychological Methods, 17(3), 437-455."
    )
    #: +1: pairs the sample answers alike (synonyms); -1: answered oppositely (antonyms).
    direction: ClassVar[int]
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "consistency_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cls.direction * cutoffs  # the score is -direction x r
    #: Wording: "alike" or "oppositely".
    _answered: ClassVar[str]

    pair_threshold: float
    consistency_cutoff: float
    min_pairs: int
    min_pair_respondents: int
    pairing: str

    # The reference ----------------------------------------------------------------------------

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        columns = instrument.content_items
        item_ids = [instrument.item_ids[c] for c in columns]
        reference: dict[str, Any] = {
            "direction": "alike" if self.direction > 0 else "opposite",
            "pair_threshold": float(self.pair_threshold),
            "pairing": self.pairing,
            "min_pair_respondents": int(self.min_pair_respondents),
            "items": item_ids,
            "respondents": int(matrix.n_respondents),
            "pairs": [],
            "correlations": [],
            "pair_respondents": [],
            "problem": None,
        }
        if len(columns) < 2:
            return reference
        r, counts = item_correlations(instrument, matrix, columns)
        first, second = np.triu_indices(len(columns), 1)
        r, counts = r[first, second], counts[first, second]
        enough = counts >= self.min_pair_respondents
        if not enough.any():
            reference["problem"] = (
                f"no item pair was answered by {self.min_pair_respondents} or more respondents "
                f"of the reference sample, which has {matrix.n_respondents}"
            )
            return reference
        # NaN (an item without variance) fails both comparisons and is never chosen.
        passing = enough & (self.direction * r > self.direction * self.pair_threshold)
        chosen = np.flatnonzero(passing)
        if self.pairing == "disjoint":
            chosen = _disjoint(chosen, np.abs(r), first, second)
        reference["pairs"] = [[item_ids[first[p]], item_ids[second[p]]] for p in chosen]
        reference["correlations"] = [float(v) for v in r[chosen]]
        reference["pair_respondents"] = [int(v) for v in counts[chosen]]
        return reference

    def _reference_problem(
        self, reference: Mapping[str, Any], item_ids: list[str]
    ) -> tuple[State, str] | None:
        """Why a stored reference cannot serve these settings or this instrument (or None)."""
        if reference.get("problem"):
            return State.NOT_ASSESSED, str(reference["problem"])
        stored = {
            "pair_threshold": float(reference["pair_threshold"]),
            "pairing": reference["pairing"],
            "min_pair_respondents": int(reference["min_pair_respondents"]),
        }
        changed = [
            f"{key} {value!r} (the setting is now {getattr(self, key)!r})"
            for key, value in stored.items()
            if value != getattr(self, key)
        ]
        if changed:
            return State.NOT_ASSESSED, (
                "the reference was estimated with " + ", ".join(changed)
                + "; estimate it again"
            )
        known = set(item_ids)
        unknown = sorted({item for pair in reference["pairs"] for item in pair} - known)
        if unknown:
            return State.NOT_ASSESSED, (
                "the reference pairs items the instrument does not have as content items: "
                + _item_list(unknown)
            )
        found = len(reference["pairs"])
        if found < self.min_pairs:
            side = "above" if self.direction > 0 else "below"
            count = "no item pair correlates" if found == 0 else (
                f"only {found} item pair{'s' * (found != 1)} correlate{'s' * (found == 1)}"
            )
            hint = "a lower" if self.direction > 0 else "a less negative"
            return State.NOT_APPLICABLE, (
                f"{count} {side} {self.pair_threshold:.2f} in the reference sample; "
                f"{self.min_pairs} needed; {hint} pair_threshold may be configured"
            )
        return None

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        n = matrix.n_respondents
        states, reasons = new_states(n)
        columns = instrument.content_items
        item_ids = [instrument.item_ids[c] for c in columns]
        r = np.full(n, np.nan)
        used = np.zeros(n, dtype=np.int64)
        pairs = reference.get("pairs", [])
        problem = (
            (State.NOT_APPLICABLE, "fewer than 2 items other than attention checks")
            if len(columns) < 2
            else self._reference_problem(reference, item_ids)
        )
        if problem is not None:
            mark(states, reasons, slice(None), *problem)
        else:
            first = np.array([instrument.item_index[a] for a, _ in pairs], dtype=np.intp)
            second = np.array([instrument.item_index[b] for _, b in pairs], dtype=np.intp)
            for rows in row_slices(n):
                r[rows], used[rows] = _pearson_rows(
                    _as_float(matrix, rows, first), _as_float(matrix, rows, second)
                )
            few = used < self.min_pairs
            for count in np.unique(used[few]).tolist():
                mark(
                    states, reasons, few & (used == count), State.NOT_ASSESSED,
                    f"answered both items of {count} of the {len(pairs)} item pairs; "
                    f"{self.min_pairs} needed",
                )
            mark(
                states, reasons, ~few & np.isnan(r), State.NOT_ASSESSED,
                "the answers to the first or to the second items of the pairs do not vary, so "
                "their correlation is undefined",
            )
        return self._result(
            instrument,
            scores=-self.direction * r,
            cutoffs=-self.direction * float(self.consistency_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "correlation": r,
                "pairs_used": used,
                "pairs_in_reference": np.full(n, len(pairs), dtype=np.int64),
                "pair_threshold": np.full(n, float(self.pair_threshold)),
                "consistency_cutoff": np.full(n, float(self.consistency_cutoff)),
            },
        )

    @classmethod
    def _sentence(cls, evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        alike = cls.direction > 0
        return (
            f"answers to {evidence['pairs_used']} pairs of items that the reference sample "
            f"answers {cls._answered} (r {'above' if alike else 'below'} "
            f"{evidence['pair_threshold']:.2f} there) correlate {evidence['correlation']:.2f} "
            f"(expected well {'above' if alike else 'below'} 0; flagged at "
            f"{evidence['consistency_cutoff']:.2f} or {'less' if alike else 'more'})"
        )

    @classmethod
    def _sentences(cls, evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        alike = cls.direction > 0
        return concat(
            "answers to ", plain(evidence["pairs_used"]), " pairs of items that the reference "
            f"sample answers {cls._answered} (r {'above' if alike else 'below'} ",
            fixed(evidence["pair_threshold"], 2), " there) correlate ",
            fixed(evidence["correlation"], 2),
            f" (expected well {'above' if alike else 'below'} 0; flagged at ",
            fixed(evidence["consistency_cutoff"], 2), f" or {'less' if alike else 'more'})",
        )


def _as_float(matrix: ResponseMatrix, rows: slice, columns: np.ndarray) -> np.ndarray:
    """Answers of one slice of respondents to ``columns`` as float64, NaN where missing."""
    raw = matrix.answers[rows][:, columns]
    values = raw.astype(np.float64)
    values[raw == MISSING] = np.nan
    return values


def _disjoint(
    chosen: np.ndarray, strength: np.ndarray, first: np.ndarray, second: np.ndarray
) -> np.ndarray:
    """Of the candidate pairs, the strongest first, each item in at most one pair."""
    taken: set[int] = set()
    kept = []
    for p in chosen[np.argsort(-strength[chosen], kind="stable")].tolist():
        a, b = int(first[p]), int(second[p])
        if a not in taken and b not in taken:
            kept.append(p)
            taken.update((a, b))
    return np.sort(np.array(kept, dtype=np.intp))
