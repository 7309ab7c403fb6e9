"""Missing answers: the share of content items a respondent left unanswered."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, counted, is_none, joined, percent, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["MissingAnswers", "LISTED_ITEMS"]

#: How many of the unanswered items the evidence names (the first ones, in presentation order).
LISTED_ITEMS = 5


class MissingAnswers(Detector):
    """Share of the content items left unanswered.

    ``share = unanswered content items / content items``, where content items are all items
    except attention checks (an unanswered attention check is judged with the other checks, not
    here). The score is that share (higher = more suspect); a respondent is flagged when it is
    at or above ``share_cutoff``. The evidence gives the count, the share and the first
    unanswered items in presentation order.

    Parameters
    ----------
    share_cutoff : float in (0, 1], default 0.5
        Flag a respondent who left at least this share of the content items unanswered.
        Heedful's choice; no published cut-off exists for carelessness. Why a half: a summed
        scale score is commonly computed (prorated) only when at least half of its items are
        answered (common practice, no source), so a respondent past that point leaves most
        scale scores unusable; skipping a few items one cannot or will not answer is ordinary
        and should not be flagged.

    Notes
    -----
    Missing answers are evidence of low effort only when the instrument allows skipping; a
    survey that forces answers has none. A respondent who answered nothing at all is an empty
    record rather than a screened response: not assessed, with that reason.

    Not applicable: the instrument has no items other than attention checks. Not assessed: no
    content item answered.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455. (The general case for screening with several kinds
    of index; it prescribes neither this index's form nor its cut-off.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 7)]})
    >>> answers = np.array([[1, np.nan, np.nan, 4, np.nan, 2], [1, 2, 3, 4, 5, np.nan]])
    >>> result = MissingAnswers().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.5, 0.16666666666666666], [True, False])
    >>> result.sentence_for(0)
    '3 of 6 items unanswered (50%): q2, q3, q5 (flagged from 50%)'
    """

    name = "missing_answers"
    family = "effort"
    summary = "Share of the items (attention checks left out) left unanswered."
    reference = (
        "Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data. "
        "Psychological Methods, 17(3), 437-455."
    )
    parameter_constraints = {"share_cutoff": Interval(float, 0, 1, closed="right")}

    def __init__(self, *, share_cutoff: float = 0.5):
        self.share_cutoff = share_cutoff

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        columns = instrument.content_items
        m = len(columns)
        missing_count = np.zeros(n, dtype=np.int64)
        listed = np.full((n, LISTED_ITEMS), -1, dtype=np.int64)
        for rows in row_slices(n):
            missing = matrix.answers[rows][:, columns] == MISSING
            count = missing.sum(axis=1)
            missing_count[rows] = count
            # Unanswered cells row by row, in item order: a cell's place among its row's is its
            # index less the number of unanswered cells in the rows before.
            row, item = np.nonzero(missing)
            place = np.arange(len(row)) - (np.cumsum(count) - count)[row]
            shown = place < LISTED_ITEMS
            listed[row[shown] + rows.start, place[shown]] = item[shown]
        names = np.array([*np.asarray(instrument.item_ids, dtype=object)[columns], None], dtype=object)
        # -1 indexes the trailing None: unlisted slots read as None.
        first_missing = names[listed]
        share = missing_count / max(m, 1)
        if m == 0:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                "the instrument has no items other than attention checks",
            )
        else:
            mark(states, reasons, missing_count == m, State.NOT_ASSESSED, "no item answered")
        return self._result(
            instrument,
            scores=share,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "missing_count": missing_count,
                "items": np.full(n, m, dtype=np.int64),
                "missing_share": share.astype(np.float64),
                "first_missing_items": first_missing,
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        count, items = evidence["missing_count"], evidence["items"]
        text = f"{count} of {items} items unanswered ({evidence['missing_share']:.0%})"
        if count:
            listed = [item for item in evidence["first_missing_items"] if item is not None]
            text += ": " + ", ".join(listed) + (", ..." if count > len(listed) else "")
        return text + f" (flagged from {evidence['share_cutoff']:.0%})"

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        count, items = evidence["missing_count"], evidence["items"]
        n = len(count)
        first = evidence["first_missing_items"]
        present = [~is_none(first[:, j]) for j in range(first.shape[1])]
        listed = counted(present, n)
        names = joined([plain(first[:, j]) for j in range(first.shape[1])], present, ", ", n)
        return concat(
            plain(count), " of ", plain(items), " items unanswered (",
            percent(evidence["missing_share"]), ")",
            choose(count != 0, concat(": ", names, choose(count > listed, ", ...", "")), ""),
            " (flagged from ", percent(evidence["share_cutoff"]), ")",
        )
