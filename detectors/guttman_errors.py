"""Normed polytomous Guttman errors over all items: are less popular answer steps taken while
more popular ones are refused?"""

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
from ._guttman import cumulative_positions, most_guttman_errors_by_score, step_positions
from ._text import TextColumn, choose, concat, fixed, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["GuttmanErrors"]

#: Patterns of answered items whose tables are built at once: 1,024 x 50 items x 6 categories
#: of float64 is 2.5 MB per table.
_GROUPS_PER_BLOCK = 1 << 10


class _Steps:
    """The content items' answers as keyed categories 0..m (m + 1 where unanswered)."""

    def __init__(self, instrument: Instrument):
        self.columns = instrument.content_items
        self.m = int(instrument.points[self.columns].max()) - 1 if len(self.columns) else 0
        lowest = instrument.lowest[self.columns].astype(np.int16)
        highest = instrument.highest[self.columns].astype(np.int16)
        reverse = instrument.keyed[self.columns] == -1
        self.sign = np.where(reverse, -1, 1).astype(np.int16)
        self.offset = np.where(reverse, highest, -lowest).astype(np.int16)

    def categories(
        self, answers: np.ndarray, rows: slice | np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Keyed categories x' - lowest (m + 1 where unanswered) and the answered mask."""
        raw = answers[rows]
        if len(self.columns) != raw.shape[1]:
            raw = np.take(raw, self.columns, axis=1)
        answered = raw != MISSING
        category = raw * self.sign + self.offset
        return np.where(answered, category, np.int16(self.m + 1)), answered


def _cell_table(cumulative: np.ndarray) -> np.ndarray:
    """C[g, i, x] laid out flat with a zero column x = m + 1 for an unanswered item."""
    groups, k, width = cumulative.shape
    table = np.zeros((groups, k, width + 1))
    table[:, :, :width] = cumulative
    return table.ravel()


def _mask_keys(answered: np.ndarray) -> np.ndarray:
    """One sortable key per row for its pattern of answered items (an integer up to 64 items)."""
    packed = np.packbits(answered, axis=1)
    if packed.shape[1] <= 8:
        padded = np.zeros((len(packed), 8), dtype=np.uint8)
        padded[:, : packed.shape[1]] = packed
        return padded.view(np.uint64)[:, 0]
    return np.ascontiguousarray(packed).view(np.dtype((np.void, packed.shape[1])))[:, 0]


class GuttmanErrors(Detector):
    """Normed polytomous Guttman errors over all items of the questionnaire.

    Every answer is keyed (x' = lowest + highest - x where the item is keyed -1; attention
    checks left out) and read as a category 0..m (m = points - 1). Each *item step*
    "x'_i >= k", k = 1..m, is a binary item; the steps are ordered by their popularity, the
    share of the reference sample passing them (among those who answered the item), most
    popular first (Molenaar 1991). A **Guttman error** is a pair of steps a, b with a more
    popular than b, b passed and a failed: the respondent takes the rarer step while refusing
    the common one. Over the answered items, with S the respondent's total keyed score::

        G = #{(a, b) : a before b, b passed, a failed}
        normed G = G / max{G(y) : y an answer pattern on the same items with total S}

    (Emons 2008), so 0 is a perfect Guttman pattern and 1 the most reversed one possible for
    that score. Uniform random answering lies well above attentive respondents on most
    questionnaires; random answers around the middle option do not (see Notes). Unlike
    ``person_fit``, which counts the errors per scale, all items are taken jointly, so the index
    also reacts to answers that disagree across scales. The score is **normed G**; a respondent
    is flagged when it is at or above ``normed_errors_cutoff``.

    Computation: with C[i, x] the summed places (counting from 0, among the steps of the
    answered items) of item i's steps 1..x, G = Σ_i C[i, x_i] - S(S - 1)/2, and the maximum
    has at most one item strictly between 0 and m (see ``detectors._guttman``), found exactly.
    The places depend only on which items were answered: respondents who answered every item
    share one table; the others are grouped by their pattern of answered items and each
    pattern's tables are built once.

    Parameters
    ----------
    normed_errors_cutoff : float in (0, 1], default 0.4
        Flag when normed G is at or above this. Heedful's fallback, read from the bfi data
        (25 six-point items, five scales): 7% of the original respondents lie at or above
        0.4, against 36% of planted uniform random answerers, whose median is 0.37 (Heedful's
        computation, see the tests). The index's spread depends on the instrument and the
        sample, so the screen is meant to replace it by a quantile of the reference sample's
        scores.
    min_answered_items : int >= 2, default 10
        A respondent is assessed only with at least this many answered items, and the index
        does not apply to instruments with fewer content items: over a few items the normed
        count takes only a few coarse values (Heedful's choice).
    min_respondents : int >= 2, default 100
        The reference needs at least this many respondents with ``min_answered_items``
        answered items to order the steps (about 100 respondents estimate a proportion to
        within ±0.1; common practice, no source).

    Notes
    -----
    **When it stops being valid.** The step order is the reference sample's: steps of nearly
    equal popularity are ordered by chance (ties keep the item order), and a sample unlike the
    screened respondents orders them wrongly. Errors count disagreement with one common
    ordering, so an instrument of several unrelated traits gives attentive respondents with
    uneven trait levels many errors; respondents high on one scale and low on another look less
    consistent than they are. A respondent with every answer in the lowest (or every answer in
    the highest) keyed category can make no error (the maximum is 0): not assessed, reported by
    ``straightlining``, ``long_string`` and the style indices. All items must have the same
    number of options, since the maximum is found for steps 1..m of every item. On the bfi data
    with 200 planted random answerers the ROC AUC of the score is 0.88 for uniform random
    answers but 0.43 for random answers around the middle option, which make few errors for
    their total score (Heedful's computation, see the tests): pair it with an index that
    catches those, such as ``person_scalability`` (0.83) or ``mahalanobis``.

    Not applicable: fewer than ``min_answered_items`` content items, or items with different
    numbers of options. Not assessed: the reference was estimated on other items, keying or
    options, or could not order the steps (too few respondents, an item nobody answered); fewer
    than ``min_answered_items`` answered items; an extreme total score.

    References
    ----------
    Molenaar, I. W. (1991). A weighted Loevinger H-coefficient extending Mokken scaling to
    multicategory items. Kwantitatieve Methoden, 12(37), 97-117. (From memory, not checked.)

    Emons, W. H. M. (2008). Nonparametric person-fit analysis of polytomous item scores.
    Applied Psychological Measurement, 32(3), 224-247.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 13)]})
    >>> rng = np.random.default_rng(0)
    >>> popularity = np.linspace(-1.5, 1.5, 12)  # items from hard to easy to agree with
    >>> trait = rng.normal(0, 0.7, (300, 1))
    >>> answers = np.clip(np.rint(3 + trait + popularity + rng.normal(0, 0.6, (300, 12))), 1, 5)
    >>> answers[0] = rng.integers(1, 6, 12)  # random answers
    >>> matrix = ResponseMatrix.from_arrays(instrument, answers)
    >>> result = GuttmanErrors().screen(instrument, matrix)
    >>> round(float(result.scores[0]), 2), round(float(np.median(result.scores[1:])), 2)
    (0.34, 0.04)
    >>> bool(result.flags[0])  # the fallback cut-off 0.4 is too high for this instrument
    False
    >>> result = GuttmanErrors(normed_errors_cutoff=0.2).screen(instrument, matrix)
    >>> result.flags.nonzero()[0].tolist()
    [0]
    >>> result.sentence_for(0)
    'answers often take rarer answer steps while refusing commoner ones: 150 Guttman errors, \
0.34 of the most possible (436) for this total score on 12 answered items (flagged at 0.20 or more)'
    """

    name = "guttman_errors"
    family = "misfit"
    needs_sample = True
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "normed_errors_cutoff"
    summary = "Normed polytomous Guttman errors over all items, steps ordered by popularity."
    reference = (
        "Emons, W. H. M. (2008). Nonparametric person-fit analysis of polytomous item scores. "
        "Applied Psychological Measurement, 32(3), 224-247."
    )
    parameter_constraints = {
        "normed_errors_cutoff": Interval(float, 0, 1, closed="right"),
        "min_answered_items": Interval(int, 2, None),
        "min_respondents": Interval(int, 2, None),
    }

    def __init__(
        self,
        *,
        normed_errors_cutoff: float = 0.4,
        min_answered_items: int = 10,
        min_respondents: int = 100,
    ):
        self.normed_errors_cutoff = normed_errors_cutoff
        self.min_answered_items = min_answered_items
        self.min_respondents = min_respondents

    def _not_applicable(self, instrument: Instrument) -> str | None:
        columns = instrument.content_items
        if len(columns) < self.min_answered_items:
            return f"fewer than {self.min_answered_items} items other than attention checks"
        points = sorted(set(instrument.points[columns].tolist()))
        if len(points) > 1:
            return (
                "the items have different numbers of answer options "
                f"({', '.join(str(p) for p in points)}); the most Guttman errors possible are "
                "found for items with one number of options"
            )
        return None

    # The reference ----------------------------------------------------------------------------

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        steps = _Steps(instrument)
        item_ids = [instrument.item_ids[c] for c in steps.columns]
        reference: dict[str, Any] = {
            "items": item_ids,
            "keyed": instrument.keyed[steps.columns].astype(int).tolist(),
            "points": steps.m + 1,
            "respondents": int(matrix.n_respondents),
            "respondents_used": 0,
            "step_popularity": None,
            "problem": self._not_applicable(instrument),
        }
        if reference["problem"]:
            return reference
        k, m = len(steps.columns), steps.m
        passed = np.zeros((k, m), dtype=np.int64)
        answered_count = np.zeros(k, dtype=np.int64)
        used = 0
        for rows in row_slices(matrix.n_respondents):
            category, answered = steps.categories(matrix.answers, rows)
            keep = answered.sum(axis=1) >= self.min_answered_items
            category, answered = category[keep], answered[keep]
            used += len(category)
            answered_count += answered.sum(axis=0)
            for step in range(1, m + 1):  # unanswered (m + 1) is masked out
                passed[:, step - 1] += ((category >= step) & answered).sum(axis=0)
        reference["respondents_used"] = used
        if used < self.min_respondents:
            reference["problem"] = (
                f"{used} respondent{'s' * (used != 1)} of the reference answered at least "
                f"{self.min_answered_items} items; at least {self.min_respondents} are needed"
            )
        elif (answered_count == 0).any():
            never = [item_ids[i] for i in np.flatnonzero(answered_count == 0)]
            reference["problem"] = f"no respondent of the reference answered {', '.join(never)}"
        else:
            reference["step_popularity"] = (passed / answered_count[:, None]).tolist()
        return reference

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        steps = _Steps(instrument)
        n, k = matrix.n_respondents, len(steps.columns)
        states, reasons = new_states(n)
        errors, most = np.full(n, np.nan), np.full(n, np.nan)
        counted = np.zeros(n, dtype=np.int64)
        item_ids = [instrument.item_ids[c] for c in steps.columns]
        keyed = instrument.keyed[steps.columns].astype(int).tolist()
        why_not = self._not_applicable(instrument)
        if why_not:
            mark(states, reasons, slice(None), State.NOT_APPLICABLE, why_not)
        elif (
            reference.get("items") != item_ids
            or reference.get("keyed") != keyed
            or reference.get("points") != steps.m + 1
        ):
            mark(
                states, reasons, slice(None), State.NOT_ASSESSED,
                "the reference was estimated on other items, keying or options than the "
                "instrument's",
            )
        elif reference.get("problem"):
            mark(states, reasons, slice(None), State.NOT_ASSESSED, str(reference["problem"]))
        else:
            positions = step_positions(np.asarray(reference["step_popularity"], dtype=np.float64))
            self._count(matrix, steps, positions, errors, most, counted)
            self._mark_unassessed(states, reasons, counted, k, most)
        assessed = states == State.ASSESSED
        normed = np.divide(errors, most, out=np.full(n, np.nan), where=assessed)
        cutoff = float(self.normed_errors_cutoff)
        return self._result(
            instrument,
            scores=normed,
            cutoffs=cutoff,
            states=states,
            reasons=reasons,
            evidence={
                "normed_errors": normed,
                "guttman_errors": np.where(assessed, errors, -1).astype(np.int64),
                "most_errors": np.where(assessed, most, -1).astype(np.int64),
                "items_answered": counted,
                "normed_errors_cutoff": np.full(n, cutoff),
            },
        )

    def _count(
        self,
        matrix: ResponseMatrix,
        steps: _Steps,
        positions: np.ndarray,
        errors: np.ndarray,
        most: np.ndarray,
        counted: np.ndarray,
    ) -> None:
        """Fill the error count, its maximum for the total score (NaN where the respondent is
        not assessed) and the answered items of every respondent.

        Respondents who answered every item share one table and are done in the first pass;
        the others are kept (their keyed categories, 1 byte per answer) and done afterwards,
        grouped by their pattern of answered items.
        """
        n, k, m = matrix.n_respondents, len(steps.columns), steps.m
        every = np.ones((1, k), dtype=bool)
        cumulative = cumulative_positions(positions, every)
        complete_table = _cell_table(cumulative)
        complete_most = most_guttman_errors_by_score(cumulative, every)[0]
        cell = np.arange(k) * (m + 2)
        ones = np.ones(k, dtype=np.float32)  # counts and scores are exact in float32
        kept_rows, kept_categories, kept_scores = [], [], []
        # One BLAS thread: the products are small, and threads would only wait between them.
        with one_blas_thread():
            for rows in row_slices(n):
                category, answered = steps.categories(matrix.answers, rows)
                count = (answered.view(np.uint8).astype(np.float32) @ ones).astype(np.int64)
                score = (
                    np.where(answered, category, 0).astype(np.float32) @ ones
                ).astype(np.int64)
                counted[rows] = count
                judged = (count >= self.min_answered_items) & (score > 0) & (score < m * count)
                complete = np.flatnonzero(judged & (count == k))
                s = score[complete]
                errors[complete + rows.start] = (
                    complete_table.take(category[complete] + cell) @ ones.astype(np.float64)
                    - s * (s - 1) / 2
                )
                most[complete + rows.start] = complete_most[s]
                partial = np.flatnonzero(judged & (count < k))
                kept_rows.append(partial + rows.start)
                kept_categories.append(category[partial].astype(np.int8))
                kept_scores.append(score[partial])
            partial_rows = np.concatenate(kept_rows)
            if len(partial_rows):
                self._count_incomplete(
                    positions, m, partial_rows, np.concatenate(kept_categories),
                    np.concatenate(kept_scores), errors, most,
                )

    @staticmethod
    def _count_incomplete(
        positions: np.ndarray,
        m: int,
        rows: np.ndarray,
        categories: np.ndarray,
        scores: np.ndarray,
        errors: np.ndarray,
        most: np.ndarray,
    ) -> None:
        """Errors and maxima of respondents with unanswered items, one table per pattern."""
        k = categories.shape[1]
        answered = categories <= m
        keys = _mask_keys(answered)
        order = np.argsort(keys, kind="stable")
        # Respondents in pattern order, so that each block of patterns is one run of rows.
        rows, categories, scores = rows[order], categories[order], scores[order]
        answered, keys = answered[order], keys[order]
        new = np.r_[True, keys[1:] != keys[:-1]]
        starts = np.flatnonzero(new)
        group_of = np.cumsum(new) - 1
        bounds = np.r_[starts, len(rows)]
        cell = np.arange(k) * (m + 2)
        width = k * (m + 2)
        ones = np.ones(k)
        for groups in row_slices(len(starts), _GROUPS_PER_BLOCK):
            masks = answered[starts[groups]]
            cumulative = cumulative_positions(positions, masks)
            table = _cell_table(cumulative)
            largest = most_guttman_errors_by_score(cumulative, masks)
            first = bounds[groups.start]
            for part in row_slices(bounds[groups.stop] - first):
                part = slice(part.start + first, part.stop + first)
                group = group_of[part] - groups.start
                index = categories[part] + cell
                index += (group * width)[:, None]
                s = scores[part]
                errors[rows[part]] = table.take(index) @ ones - s * (s - 1) / 2
                most[rows[part]] = largest[group, s]

    def _mark_unassessed(
        self, states: np.ndarray, reasons: np.ndarray, counted: np.ndarray, k: int, most: np.ndarray
    ) -> None:
        least = self.min_answered_items
        too_few = counted < least
        for count in np.unique(counted[too_few]).tolist():
            reason = (
                "no item answered"
                if count == 0
                else f"answered {count} of {k} items; at least {least} are needed"
            )
            mark(states, reasons, too_few & (counted == count), State.NOT_ASSESSED, reason)
        mark(
            states, reasons, ~too_few & ~(most > 0), State.NOT_ASSESSED,
            "every answer in the lowest option, or every answer in the highest (keyed): no "
            "Guttman error is possible",
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        normed, cutoff = evidence["normed_errors"], evidence["normed_errors_cutoff"]
        lead = (
            "answers often take rarer answer steps while refusing commoner ones"
            if normed >= cutoff
            else "answers mostly follow the sample's order of answer steps"
        )
        return (
            f"{lead}: {evidence['guttman_errors']} Guttman errors, {normed:.2f} of the most "
            f"possible ({evidence['most_errors']}) for this total score on "
            f"{evidence['items_answered']} answered items (flagged at {cutoff:.2f} or more)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        normed, cutoff = evidence["normed_errors"], evidence["normed_errors_cutoff"]
        lead = choose(
            normed >= cutoff,
            "answers often take rarer answer steps while refusing commoner ones",
            "answers mostly follow the sample's order of answer steps",
        )
        return concat(
            lead, ": ", plain(evidence["guttman_errors"]), " Guttman errors, ", fixed(normed, 2),
            " of the most possible (", plain(evidence["most_errors"]), ") for this total score on ",
            plain(evidence["items_answered"]), " answered items (flagged at ", fixed(cutoff, 2),
            " or more)",
        )
