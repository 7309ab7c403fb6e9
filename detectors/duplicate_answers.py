"""Duplicate answers: respondents whose answers are identical to another respondent's."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, counted, is_none, joined, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["DuplicateAnswers", "LISTED_RESPONDENTS", "identical_row_groups"]

#: How many of the other respondents with the same answers the evidence names.
LISTED_RESPONDENTS = 5


def _row_hashes(rows: np.ndarray) -> np.ndarray:
    """A 64-bit hash of each row of an int8 array (equal rows, equal hashes)."""
    import pandas as pd

    width = -(-rows.shape[1] // 8) * 8
    padded = np.zeros((rows.shape[0], width), dtype=np.int8)
    padded[:, : rows.shape[1]] = rows
    # Eight answers to a 64-bit word, each word column hashed and the columns combined.
    words = pd.DataFrame(padded.view(np.uint64))
    return pd.util.hash_pandas_object(words, index=False).to_numpy()


def identical_row_groups(rows: np.ndarray) -> np.ndarray:
    """Label each row of a 2-D int8 array with a group number shared exactly by its equal rows.

    Rows are hashed and the hashes numbered in one pass (linear in the number of rows); each
    row is then compared with the first row of its hash group, so rows that only share a hash
    (a collision) are never put together: the few such rows are grouped again by an exact sort.
    """
    n = rows.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    import pandas as pd

    codes, uniques = pd.factorize(_row_hashes(rows))
    codes = codes.astype(np.int64)
    # factorize numbers hashes in order of first appearance: a row opens a new group exactly
    # where its code exceeds every code before it.
    opens = np.empty(n, dtype=bool)
    opens[0] = True
    opens[1:] = codes[1:] > np.maximum.accumulate(codes)[:-1]
    first_row = np.flatnonzero(opens)  # first_row[g] is the first row of hash group g
    agrees = np.ones(n, dtype=bool)
    for part in row_slices(n):
        agrees[part] = (rows[part] == rows[first_row[codes[part]]]).all(axis=1)
    if not agrees.all():
        apart = np.flatnonzero(~agrees)
        _, inverse = np.unique(rows[apart], axis=0, return_inverse=True)
        codes[apart] = len(uniques) + inverse.reshape(-1)
    return codes


class DuplicateAnswers(Detector):
    """Duplicate answers: the number of other respondents whose answers are exactly the same.

    Two respondents are duplicates when they gave the same raw answer to every content item
    (attention checks left out), and left the same items unanswered. Such pairs arise from a
    response submitted twice under different ids, one person answering under several ids (for
    repeated incentives), copied or fabricated records, and scripted answering. The score is the
    number of other respondents in the matrix with the same answers (group size - 1); a
    respondent is flagged when it is at or above ``min_copies``. Every member of a group is
    flagged alike: the data cannot tell which record is the original. The evidence names up to
    :data:`LISTED_RESPONDENTS` of the others.

    Groups are found by hashing each row of answers and numbering the hashes (linear in the
    number of respondents, no pairwise comparison); rows sharing a hash are confirmed equal to
    the first row of their group, so a hash collision cannot make a false duplicate.

    Parameters
    ----------
    min_answered : int >= 2, default 10
        Only respondents who answered at least this many content items are judged. Heedful's
        choice: two respondents answering p options uniformly at random agree on k given items
        with probability p^-k, about 1 in 10 million for 10 items on 5 points, so among 1,000
        respondents (half a million pairs) a chance match is unlikely (about 0.05 expected).
        Real answers are far from uniform, which makes chance matches on short or homogeneous
        instruments more likely; ten items keeps them rare.
    min_copies : int >= 1, default 1
        Flag a respondent whose answers at least this many other respondents share. One copy is
        already unusual (see ``min_answered``).

    Notes
    -----
    Only exact duplicates are found; near-duplicates (records identical except for a few
    altered answers) are not, and a fabricated record varied on purpose escapes the index.

    The index sees only the respondents of the matrix it is given. A batch posted to the service
    is compared within itself; the nightly re-screen compares the stored respondents of each
    survey version together (in chunks of the re-screen's size, 50,000 at the time of writing).
    So a duplicate of an earlier respondent is found by the re-screen, not on arrival.

    Identical answers are unremarkable when the answer vectors have little room to differ: a
    short instrument, few options, or a homogeneous sample. Respondents whose answered items all
    got the same answer are straight-liners, judged by straightlining and long-string, and are
    not assessed here (identical straight lines are common and say nothing about copying).

    Not applicable: the instrument has fewer than ``min_answered`` content items. Not assessed:
    fewer than ``min_answered`` content items answered, or one answer to all of them. A flag is
    evidence for a reviewer's decision (which record to keep, whether to ask the platform), not
    a verdict on a respondent.

    References
    ----------
    Kuriakose, N., & Robbins, M. (2016). Don't get duplicated! Statistical Journal of the IAOS,
    32(3), 283-291. (Cited from memory: the full title and pages were not checked. The paper
    screens survey data for near-duplicate interviews by each respondent's highest share of
    matching answers with any other respondent; this index is its exact-match case.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 5)]})
    >>> answers = np.array([[1, 2, 3, np.nan], [1, 2, 3, np.nan], [1, 2, 3, 4], [3, 3, 3, 3]])
    >>> matrix = ResponseMatrix.from_arrays(instrument, answers, ["a", "b", "c", "d"])
    >>> result = DuplicateAnswers(min_answered=3).screen(instrument, matrix)
    >>> result.scores.tolist(), result.flags.tolist()
    ([1.0, 1.0, 0.0, nan], [True, True, False, False])
    >>> result.sentence_for(0)
    'same answers as 1 other respondent on all 3 answered items of 4, unanswered items \
included: b'
    """

    name = "duplicate_answers"
    compares_respondents = ("same_answers_count", "same_answers_as")
    family = "effort"
    summary = "Number of other respondents who gave exactly the same answers."
    reference = (
        "Kuriakose, N., & Robbins, M. (2016). Don't get duplicated! Statistical Journal of the "
        "IAOS, 32(3), 283-291."
    )
    parameter_constraints = {
        "min_answered": Interval(int, 2, None),
        "min_copies": Interval(int, 1, None),
    }

    def __init__(self, *, min_answered: int = 10, min_copies: int = 1):
        self.min_answered = min_answered
        self.min_copies = min_copies

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        columns = instrument.content_items
        m = len(columns)
        answered = np.zeros(n, dtype=np.int64)
        one_answer = np.zeros(n, dtype=bool)
        for rows in row_slices(n):
            block = matrix.answers[rows][:, columns]
            given = block != MISSING
            answered[rows] = given.sum(axis=1)
            # MISSING lies below every valid code: the maximum is the highest answer given.
            highest = block.max(axis=1, initial=MISSING)
            one_answer[rows] = ((block == highest[:, None]) | ~given).all(axis=1)
        judged = (answered >= self.min_answered) & ~one_answer
        judged_rows = np.flatnonzero(judged)
        group = identical_row_groups(np.ascontiguousarray(matrix.answers[judged_rows][:, columns]))
        sizes = np.bincount(group)
        copies = np.zeros(n, dtype=np.int64)
        copies[judged_rows] = sizes[group] - 1
        listed = np.full((n, LISTED_RESPONDENTS), None, dtype=object)
        shared = copies[judged_rows] > 0
        if shared.any():
            listed[judged_rows[shared]] = _others(judged_rows[shared], group[shared], matrix.respondent_ids)

        if m < self.min_answered:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"the instrument has fewer than {self.min_answered} items other than attention "
                "checks",
            )
        else:
            mark(
                states, reasons, (answered >= self.min_answered) & one_answer, State.NOT_ASSESSED,
                "one answer to every answered item: a straight line, which straightlining judges",
            )
            mark(
                states, reasons, answered < self.min_answered, State.NOT_ASSESSED,
                f"fewer than {self.min_answered} items answered",
            )
        return self._result(
            instrument,
            scores=copies.astype(np.float64),
            cutoffs=float(self.min_copies),
            states=states,
            reasons=reasons,
            evidence={
                "same_answers_count": copies,
                "same_answers_as": listed,
                "items_answered": answered,
                "items": np.full(n, m, dtype=np.int64),
                "min_copies": np.full(n, int(self.min_copies), dtype=np.int64),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        count, answered, items = (
            evidence["same_answers_count"], evidence["items_answered"], evidence["items"]
        )
        if count == 0:
            return f"no other respondent gave the same answers ({answered} of {items} items answered)"
        others = "other respondent" if count == 1 else "other respondents"
        if answered == items:
            where = f"all {items} items"
        else:
            where = f"all {answered} answered items of {items}, unanswered items included"
        listed = [rid for rid in evidence["same_answers_as"] if rid is not None]
        text = f"same answers as {count} {others} on {where}: " + ", ".join(listed)
        if count > len(listed):
            text += f" and {count - len(listed)} more"
        if evidence["min_copies"] > 1:
            text += f" (flagged from {evidence['min_copies']} others)"
        return text

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        count, answered, items = (
            evidence["same_answers_count"], evidence["items_answered"], evidence["items"]
        )
        n = len(count)
        nobody = concat(
            "no other respondent gave the same answers (", plain(answered), " of ", plain(items),
            " items answered)",
        )
        where = choose(
            answered == items, concat("all ", plain(items), " items"),
            concat("all ", plain(answered), " answered items of ", plain(items),
                   ", unanswered items included"),
        )
        others = evidence["same_answers_as"]
        present = [~is_none(others[:, j]) for j in range(others.shape[1])]
        listed = counted(present, n)
        names = joined([plain(others[:, j]) for j in range(others.shape[1])], present, ", ", n)
        text = concat(
            "same answers as ", plain(count), " ",
            choose(count == 1, "other respondent", "other respondents"), " on ", where, ": ", names,
            choose(count > listed, concat(" and ", plain(count - listed), " more"), ""),
            choose(
                evidence["min_copies"] > 1,
                concat(" (flagged from ", plain(evidence["min_copies"]), " others)"), "",
            ),
        )
        return choose(count == 0, nobody, text)


def _others(rows: np.ndarray, group: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """For each of ``rows`` (members of groups of two or more), the ids of up to
    LISTED_RESPONDENTS other members of its group, in row order, None-padded."""
    order = np.lexsort((rows, group))
    members, member_group = rows[order], group[order]
    opens = np.r_[True, member_group[1:] != member_group[:-1]]
    starts = np.flatnonzero(opens)
    sizes = np.diff(np.r_[starts, len(members)])
    # Where each member's group begins among the sorted members, and its size.
    at = np.cumsum(opens) - 1
    begin, size = starts[at], sizes[at]
    # The first LISTED_RESPONDENTS + 1 members of each group; the row itself is dropped.
    offsets = np.arange(LISTED_RESPONDENTS + 1)
    slot = begin[:, None] + offsets
    present = offsets < size[:, None]
    candidate = members[np.minimum(slot, len(members) - 1)]
    keep = present & (candidate != members[:, None])
    first = np.argsort(~keep, axis=1, kind="stable")[:, :LISTED_RESPONDENTS]
    chosen = np.take_along_axis(candidate, first, axis=1)
    shown = np.take_along_axis(keep, first, axis=1)
    names = np.where(shown, ids[chosen], None)
    out = np.empty_like(names)
    out[order] = names
    return out
