"""Person scalability HT: does a respondent order the items as the other respondents do?"""

from __future__ import annotations

import math
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
from ._text import TextColumn, choose, concat, fixed, plain, plural
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["PersonScalability"]


class _Keying:
    """The content items' answers keyed (x' = lowest + highest - x where keyed -1) and shifted
    so that the lowest code of any item is 0: small non-negative integers, ``MISSING`` kept."""

    def __init__(self, instrument: Instrument):
        self.columns = instrument.content_items
        lowest = instrument.lowest[self.columns].astype(np.int16)
        highest = instrument.highest[self.columns].astype(np.int16)
        self.base = int(lowest.min()) if len(self.columns) else 0
        self.top = int(highest.max()) - self.base if len(self.columns) else 0
        reverse = instrument.keyed[self.columns] == -1
        self.sign = np.where(reverse, -1, 1).astype(np.int16)
        self.offset = np.where(reverse, lowest + highest, 0).astype(np.int16) - self.base

    def values(
        self, answers: np.ndarray, rows: slice | np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Keyed, shifted answers (int16) of the rows and their missing mask."""
        raw = answers[rows]
        if len(self.columns) != raw.shape[1]:
            raw = np.take(raw, self.columns, axis=1)
        missing = raw == MISSING
        return raw * self.sign + self.offset, missing


def _below_counts(values: np.ndarray, top: int) -> np.ndarray:
    """(rows, top): how many of each row's values are <= v, for v = 0..top-1."""
    ones = np.ones(values.shape[1], dtype=np.float32)  # counts are exact in float32
    out = np.empty((len(values), top), dtype=np.int64)
    for v in range(top):
        out[:, v] = np.less_equal(values, v).view(np.uint8).astype(np.float32) @ ones
    return out


class PersonScalability(Detector):
    """Person scalability coefficient HT: Loevinger's H with persons in the place of items.

    The data are transposed, so that each respondent is a "variable" whose values are the
    answers to the items (attention checks left out; answers keyed, x' = lowest + highest - x
    where the item is keyed -1). For respondent n and the R respondents m of a reference
    sample::

        HT_n = Σ_m Cov(X_n, X_m) / Σ_m Covmax(X_n, X_m)

    with covariances taken across the k items and Covmax(X_n, X_m) the covariance of the two
    vectors after sorting each in ascending order, the largest covariance their values allow.
    HT is 1 when the respondent's answers order the items as every reference respondent's
    do (in the sense of Mokken's model, read for persons), near 0 for answers unrelated to the
    sample's ordering of the items, e.g. random answering, and negative for a reversed
    ordering. The score is **-HT** (higher = more suspect); a respondent is flagged when HT is at
    or below ``scalability_cutoff``.

    Computation: with centred vectors c = x - mean(x),
    ``Σ_m Cov(X_n, X_m) = c_n · (Σ_m c_m) / k`` and
    ``Σ_m Covmax(X_n, X_m) = sort(c_n) · (Σ_m sort(c_m)) / k``, so the reference is two sums
    of k numbers and each respondent costs one pass over their answers. Answers are integers,
    so the sums are kept as integers (column sums, sums of sorted rows, the grand total) and
    HT_n = (k a_n - T s_n) / (k b_n - T s_n), with a_n = x_n · (column sums),
    b_n = sort(x_n) · (sorted sums), s_n = Σ x_n and T the grand total: exact up to the final
    division, whatever the order of the respondents. sort(x_n) · w is read from counts
    (how many answers are at most v) rather than by sorting.

    The reference (``fit``) is estimated from a sample, or from the screened matrix itself. It
    holds each item's fill value (its keyed mean over the respondents who answered it, rounded
    to the nearest answer code) and the sums above over the reference respondents with at most
    ``max_missing_share`` missing answers, whose missing answers are filled with those values.

    Parameters
    ----------
    scalability_cutoff : float in [-1, 1], default 0.0
        Flag when HT is at or below this: an ordering of the items that agrees with the
        sample's no better than chance (random answering has HT near 0). Heedful's fallback.
        HT's values depend on the instrument and the sample (how strongly the items differ in
        popularity, how many traits they measure), so the screen is meant to replace it by a
        quantile of the reference sample's scores. On the bfi data (25 items, five scales) the
        original respondents' median HT is 0.21 and 12% lie at or below 0 (Heedful's
        computation, see the tests); the 0.3 used as the lower bound of Loevinger's H for a
        scalable item in Mokken scaling (Mokken 1971; from memory) would flag three quarters of
        them.
    max_missing_share : float in [0, 1), default 0.2
        Respondents (screened or in the reference) with a larger share of missing answers are
        not assessed (left out of the reference). Missing answers are filled with the item's
        fill value, which pulls HT towards the reference's common ordering; Heedful's choice is
        to allow at most a fifth of the answers to be filled.
    min_items : int >= 3, default 10
        Not applicable to instruments with fewer content items: a covariance across a handful
        of items rests on too few points (Heedful's choice).
    min_respondents : int >= 2, default 100
        The reference needs at least this many respondents with at most ``max_missing_share``
        missing answers (Heedful's choice, as for the other reference-based indices).

    Notes
    -----
    **The respondent in the reference.** Screening the sample the reference came from (the
    default without a stored reference) includes the term m = n, which adds the same amount
    |c_n|²/k to the numerator and the denominator and so pulls HT towards 1 by
    (1 - HT) |c_n|² / (k Σ_m Covmax + |c_n|²), roughly (1 - HT)/R for a respondent of typical
    spread: 1% of the distance to 1 for 100 reference respondents, 0.04% for 2,800. It is not
    removed: the detector cannot tell whether a screened respondent belongs to a stored
    reference, and keeping it gives the same value in both ways of screening; the bias lies on
    the lenient side.

    **When it stops being valid.** HT measures agreement with the *sample's* ordering of the
    items: with items of nearly equal popularity, or an instrument of several unrelated
    traits, attentive respondents also have HT near 0, and the fixed cut-off flags many of them
    (hence the calibration from the reference). Filled answers make HT higher (more like
    everyone else), so a respondent near ``max_missing_share`` is judged leniently. Items with
    different answer ranges are compared on their raw codes, which gives wide-range items more
    weight. On the bfi data with 200 planted random answerers the ROC AUC of the score is 0.86
    for uniform random answers and 0.83 for random answers around the middle option (Heedful's
    computation, see the tests).

    Not applicable: fewer than ``min_items`` content items. Not assessed: the reference was
    estimated on other items or keying, or has fewer than ``min_respondents`` usable
    respondents or none whose answers vary; more than ``max_missing_share`` answers missing;
    keyed answers without variation (one option throughout on items keyed alike: HT is 0/0;
    ``straightlining`` and ``long_string`` report them).

    References
    ----------
    Sijtsma, K. (1986). A coefficient of deviance of response patterns. Kwantitatieve
    Methoden, 7, 5-14. (Details from memory, not checked.)

    Sijtsma, K., & Meijer, R. R. (1992). A method for investigating the intersection of item
    response functions in Mokken's nonparametric IRT model. Applied Psychological
    Measurement, 16(2), 149-157.

    Mokken, R. J. (1971). A Theory and Procedure of Scale Analysis. The Hague: Mouton.
    (From memory, not checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 13)]})
    >>> rng = np.random.default_rng(0)
    >>> popularity = np.linspace(-1.5, 1.5, 12)  # items from hard to easy to agree with
    >>> answers = np.clip(np.rint(3 + popularity + rng.normal(0, 0.8, (300, 12))), 1, 5)
    >>> answers[0] = rng.integers(1, 6, 12)  # random answers
    >>> result = PersonScalability().screen(
    ...     instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> round(float(result.evidence["scalability"][0]), 2), bool(result.flags[0])
    (-0.32, True)
    >>> round(float(np.median(result.evidence["scalability"][1:])), 2), int(result.flags.sum())
    (0.66, 1)
    >>> result.sentence_for(0)
    'answers order the items unlike the reference sample: HT -0.32 over 12 items against 300 \
reference respondents (flagged at 0.00 or less)'
    """

    name = "person_scalability"
    family = "misfit"
    needs_sample = True
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "scalability_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cutoffs  # the score is the negative of the value the sentence states
    summary = "Person scalability HT: agreement with the sample's ordering of the items."
    reference = (
        "Sijtsma, K., & Meijer, R. R. (1992). A method for investigating the intersection of "
        "item response functions in Mokken's nonparametric IRT model. Applied Psychological "
        "Measurement, 16(2), 149-157."
    )
    parameter_constraints = {
        "scalability_cutoff": Interval(float, -1, 1),
        "max_missing_share": Interval(float, 0, 1, closed="left"),
        "min_items": Interval(int, 3, None),
        "min_respondents": Interval(int, 2, None),
    }

    def __init__(
        self,
        *,
        scalability_cutoff: float = 0.0,
        max_missing_share: float = 0.2,
        min_items: int = 10,
        min_respondents: int = 100,
    ):
        self.scalability_cutoff = scalability_cutoff
        self.max_missing_share = max_missing_share
        self.min_items = min_items
        self.min_respondents = min_respondents

    def _most_missing(self, k: int) -> int:
        return math.floor(self.max_missing_share * k + 1e-9)

    # The reference ----------------------------------------------------------------------------

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        keying = _Keying(instrument)
        k = len(keying.columns)
        item_ids = [instrument.item_ids[c] for c in keying.columns]
        reference: dict[str, Any] = {
            "items": item_ids,
            "keyed": instrument.keyed[keying.columns].astype(int).tolist(),
            "respondents": int(matrix.n_respondents),
            "respondents_used": 0,
            "fill_answers": None,
            "column_sums": None,
            "sorted_sums": None,
            "total": None,
            "problem": None,
        }
        if k < self.min_items:
            reference["problem"] = f"fewer than {self.min_items} items other than attention checks"
            return reference
        n = matrix.n_respondents
        sums, counts = np.zeros(k, dtype=np.int64), np.zeros(k, dtype=np.int64)
        for rows in row_slices(n):
            values, missing = keying.values(matrix.answers, rows)
            sums += np.where(missing, 0, values).sum(axis=0, dtype=np.int64)
            counts += (~missing).sum(axis=0)
        if (counts == 0).any():
            never = [item_ids[i] for i in np.flatnonzero(counts == 0)]
            reference["problem"] = (
                f"no respondent of the reference answered {', '.join(never)}"
            )
            return reference
        # Rounded to an answer code, so that filled rows stay integers (exact sums, no sorting).
        fill = np.rint(sums / counts).astype(np.int16)
        most_missing = self._most_missing(k)
        column_sums = np.zeros(k, dtype=np.int64)
        below = np.zeros((keying.top, k + 1), dtype=np.int64)
        used = 0
        for rows in row_slices(n):
            values, missing = keying.values(matrix.answers, rows)
            keep = missing.sum(axis=1) <= most_missing
            values = np.where(missing, fill, values)[keep]
            used += len(values)
            column_sums += values.sum(axis=0, dtype=np.int64)
            counts_below = _below_counts(values, keying.top)
            for v in range(keying.top):
                below[v] += np.bincount(counts_below[:, v], minlength=k + 1)
        reference["respondents_used"] = used
        reference["fill_answers"] = (fill + keying.base).astype(int).tolist()
        if used < self.min_respondents:
            reference["problem"] = (
                f"{used} respondent{'s' * (used != 1)} of the reference answered at least "
                f"{k - most_missing} of the {k} items; at least {self.min_respondents} are needed"
            )
            return reference
        # The sorted row's value at rank r is the number of thresholds v with
        # #(values < v) <= r, so Σ_m sort(x_m)[r] = Σ_v #{m : #(x_m <= v - 1) <= r}.
        sorted_sums = np.cumsum(below, axis=1)[:, :k].sum(axis=0)
        if sorted_sums[0] == sorted_sums[-1]:
            reference["problem"] = "no respondent of the reference varies in their keyed answers"
            return reference
        reference["column_sums"] = column_sums.tolist()
        reference["sorted_sums"] = sorted_sums.tolist()
        reference["total"] = int(column_sums.sum())
        return reference

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        keying = _Keying(instrument)
        k = len(keying.columns)
        n = matrix.n_respondents
        states, reasons = new_states(n)
        ht = np.full(n, np.nan)
        filled = np.zeros(n, dtype=np.int64)
        item_ids = [instrument.item_ids[c] for c in keying.columns]
        keyed = instrument.keyed[keying.columns].astype(int).tolist()
        if k < self.min_items:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"fewer than {self.min_items} items other than attention checks",
            )
        elif reference.get("items") != item_ids or reference.get("keyed") != keyed:
            mark(
                states, reasons, slice(None), State.NOT_ASSESSED,
                "the reference was estimated on other items or keying than the instrument's",
            )
        elif reference.get("problem"):
            mark(states, reasons, slice(None), State.NOT_ASSESSED, str(reference["problem"]))
        else:
            self._scalability(matrix, keying, reference, ht, filled)
            too_many = filled > self._most_missing(k)
            mark(
                states, reasons, too_many & (filled == k), State.NOT_ASSESSED, "no item answered"
            )
            mark(
                states, reasons, too_many & (filled < k), State.NOT_ASSESSED,
                f"more than {self.max_missing_share:.0%} of the {k} items unanswered",
            )
            mark(
                states, reasons, ~too_many & np.isnan(ht), State.NOT_ASSESSED,
                "the keyed answers do not vary, so HT is undefined",
            )
        cutoff = float(self.scalability_cutoff)
        return self._result(
            instrument,
            scores=-ht,
            cutoffs=-cutoff,
            states=states,
            reasons=reasons,
            evidence={
                "scalability": np.where(states == State.ASSESSED, ht, np.nan),
                "items": np.full(n, k),
                "answers_filled": filled,
                "reference_respondents": np.full(n, int(reference.get("respondents_used") or 0)),
                "scalability_cutoff": np.full(n, cutoff),
            },
        )

    @staticmethod
    def _scalability(
        matrix: ResponseMatrix,
        keying: _Keying,
        reference: Mapping[str, Any],
        ht: np.ndarray,
        filled: np.ndarray,
    ) -> None:
        """Fill HT (NaN where the answers do not vary) and the number of filled answers."""
        k = len(keying.columns)
        fill = np.asarray(reference["fill_answers"], dtype=np.int16) - keying.base
        column_sums = np.asarray(reference["column_sums"], dtype=np.float64)
        sorted_sums = np.asarray(reference["sorted_sums"], dtype=np.int64)
        total = int(reference["total"])
        # tail[c] = Σ_{r >= c} sorted_sums[r], so sort(x) · sorted_sums = Σ_v tail[#(x <= v-1)].
        tail = np.zeros(k + 1, dtype=np.int64)
        tail[:k] = np.cumsum(sorted_sums[::-1])[::-1]
        ones = np.ones(k, dtype=np.float32)
        # One BLAS thread: the products are small, and threads would only wait between them.
        with one_blas_thread():
            for rows in row_slices(matrix.n_respondents):
                values, missing = keying.values(matrix.answers, rows)
                filled[rows] = missing.view(np.uint8).astype(np.float32) @ ones
                np.copyto(values, fill, where=missing)
                # Integer products below 2**53, so exact in float64 in any order.
                a = (values.astype(np.float64) @ column_sums).astype(np.int64)
                below = _below_counts(values, keying.top)
                b = np.zeros(len(a), dtype=np.int64)
                s = np.full(len(a), k * keying.top, dtype=np.int64)
                for v in range(keying.top):
                    b += tail[below[:, v]]
                    s -= below[:, v]
                numerator = k * a - total * s
                denominator = k * b - total * s
                ht[rows] = np.divide(
                    numerator, denominator, out=np.full(len(s), np.nan), where=denominator > 0
                )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        value, cutoff = evidence["scalability"], evidence["scalability_cutoff"]
        verb = "unlike" if value <= cutoff else "like"
        filled = evidence["answers_filled"]
        note = (
            f", {filled} missing answer{'s' * (filled != 1)} filled with the item's typical answer"
            if filled else ""
        )
        return (
            f"answers order the items {verb} the reference sample: HT {value:.2f} over "
            f"{evidence['items']} items against {evidence['reference_respondents']} reference "
            f"respondents{note} (flagged at {cutoff:.2f} or less)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        value, cutoff = evidence["scalability"], evidence["scalability_cutoff"]
        filled = evidence["answers_filled"]
        return concat(
            "answers order the items ", choose(value <= cutoff, "unlike", "like"),
            " the reference sample: HT ", fixed(value, 2), " over ", plain(evidence["items"]),
            " items against ", plain(evidence["reference_respondents"]),
            " reference respondents",
            choose(filled != 0, concat(
                ", ", plain(filled), " missing answer", plural(filled),
                " filled with the item's typical answer",
            ), ""),
            " (flagged at ", fixed(cutoff, 2), " or less)",
        )
