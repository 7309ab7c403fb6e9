"""Sequence patterns: runs of answers that follow a simple rule (diagonals, short cycles)."""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache
from typing import Any

import numpy as np

from ._base import (
    Detector,
    DetectorResult,
    Interval,
    Options,
    State,
    item_range,
    item_ranges,
    mark,
    new_states,
    row_slices,
)
from ._text import TextColumn, choose, concat, counted, is_none, joined, percent, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["SequencePattern", "chance_of_pattern"]

#: The rules, in the order they are tried for the evidence: steps, then periods 2 and 3.
RULES = ("steps", "period_2", "period_3")
#: Answers of the longest run quoted in the evidence.
_VALUES_SHOWN = 6


@lru_cache(maxsize=64)
def chance_of_pattern(
    n_items: int,
    points: int,
    step_run: int | None = None,
    period_2_run: int | None = None,
    period_3_run: int | None = None,
) -> float:
    """Probability that ``n_items`` uniformly random answers on ``points`` points hold at least
    one run counted by :class:`SequencePattern` with these minimum lengths (None: rule off).

    Exact, by a Markov chain whose state after each answer is the last three answers, the
    length of the current step run (capped) and the number of answers in a row that repeat the
    answer two (three) places back (capped); runs of the cycle rules are counted only when
    their answers are not all equal, which the last answers decide. Reaching a counted run is
    absorbing. All items are taken as keyed alike (with mixed keying a few more runs are
    excluded, so the chance is at most this) and answered, in one block.
    """
    if (
        (step_run is not None and step_run < 3)
        or (period_2_run is not None and period_2_run < 4)
        or (period_3_run is not None and period_3_run < 6)
    ):
        raise ValueError("minimum lengths are at least 3 (steps), 4 (period 2) and 6 (period 3)")
    if n_items < 3:
        return 0.0
    p = points
    # Dimensions: current step run 1..step_run-1; repeat counts 0..run-p (the top value is
    # reachable without absorption only by a constant run, which is not counted).
    d_step = step_run - 1 if step_run else 1
    d_two = period_2_run - 1 if period_2_run else 1
    d_three = period_3_run - 2 if period_3_run else 1
    shape = (p, p, p, d_step, d_two, d_three)
    size = int(np.prod(shape))
    a, b, c, run, two, three = (v.ravel() for v in np.indices(shape))
    run = run + 1
    at_end = (c == 0) | (c == p - 1)
    moves = []
    for y in range(p):
        hit = np.zeros(size, dtype=bool)
        run_index = np.zeros(size, dtype=np.intp)
        two_index = np.zeros(size, dtype=np.intp)
        three_index = np.zeros(size, dtype=np.intp)
        if step_run:
            step = np.abs(y - c) == 1
            goes_on = step & (run >= 2) & (((y - c) == (c - b)) | at_end)
            longer = np.where(goes_on, run + 1, np.where(step, 2, 1))
            hit |= longer >= step_run
            run_index = np.minimum(longer, d_step) - 1
        if period_2_run:
            repeats = np.where(y == b, two + 1, 0)
            hit |= (repeats >= period_2_run - 2) & (c != y)
            two_index = np.minimum(repeats, period_2_run - 2)
        if period_3_run:
            repeats = np.where(y == a, three + 1, 0)
            hit |= (repeats >= period_3_run - 3) & ~((b == c) & (c == y))
            three_index = np.minimum(repeats, period_3_run - 3)
        target = np.ravel_multi_index(
            (b, c, np.full(size, y), run_index, two_index, three_index), shape
        )
        moves.append((target[~hit], ~hit, hit))
    # The first three answers, each of the p**3 triples equally likely.
    first, second, third = (v.ravel() for v in np.indices((p, p, p)))
    run = np.where(np.abs(second - first) == 1, 2, 1)
    step = np.abs(third - second) == 1
    turn_ok = ((third - second) == (second - first)) | (second == 0) | (second == p - 1)
    run = np.where(step & (run >= 2) & turn_ok, run + 1, np.where(step, 2, 1))
    hit = run >= step_run if step_run else np.zeros(len(run), dtype=bool)
    start = np.ravel_multi_index(
        (
            first, second, third,
            np.minimum(run, d_step) - 1 if step_run else np.zeros(len(run), dtype=np.intp),
            (third == first).astype(np.intp) if period_2_run else np.zeros(len(run), np.intp),
            np.zeros(len(run), dtype=np.intp),
        ),
        shape,
    )
    absorbed = hit.sum() / p**3
    alive = np.bincount(start[~hit], minlength=size) / p**3
    for _ in range(n_items - 3):
        moved = np.zeros(size)
        for target, stays, hit in moves:
            absorbed += alive[hit].sum() / p
            moved += np.bincount(target, weights=alive[stays] / p, minlength=size)
        alive = moved
    return float(absorbed)


class SequencePattern(Detector):
    """Share of the answers that lie in runs following a simple rule.

    The answers to the content items (attention checks left out) are read **raw** in
    presentation order; a missing answer ends a run, and so does the start of a new block
    unless ``cross_blocks`` is set. Three rules are looked for:

    - **steps**: every answer is one above or one below the previous one, and the direction
      changes only at the ends of the item's scale, as when a diagonal line is drawn across a
      grid and bounces at its edges: 1,2,3,4,5,4,3,2,1,2 is one run. A change of direction in
      the middle of the scale (3,4,3) ends the run.
    - **period 2**: every answer equals the one two places back (1,2,1,2 or 2,5,2,5).
    - **period 3**: every answer equals the one three places back (1,3,5,1,3,5).

    A run of a cycle rule whose answers are all equal is straightlining, judged by
    ``straightlining`` and ``long_string``, and is not counted. Neither is a run whose answers
    are all equal **after reverse keying** ((lowest + highest) - x): answering 4,2,4,2 to
    items keyed +,-,+,- expresses one opinion throughout, which is what an attentive
    respondent does. A run counts when it is at least as long as the rule's minimum length.
    The score is the share of the answered content items that lie in at least one counted run
    (runs of different rules may overlap); a respondent is flagged when it is at or above
    ``share_cutoff``. The evidence names the longest run, its rule, its first answers and its
    first and last item.

    Parameters
    ----------
    min_step_run : int >= 3, default 8
        Shortest counted run of the steps rule, in items.
    min_period_2_run : int >= 4, default 8
        Shortest counted run of the period-2 rule, in items.
    min_period_3_run : int >= 6, default 9
        Shortest counted run of the period-3 rule, in items.
    share_cutoff : float in (0, 1], default 0.25
        Flag a respondent when at least this share of their answered content items lies in
        counted runs. Heedful's choice: a quarter is more than one run of minimum length in
        a 50-item questionnaire (8 items, 16%), so a single run that could be a coincidence
        on a long questionnaire is reported in the score but not flagged, while a respondent
        who draws patterns through a sizeable part of the questionnaire is. On questionnaires
        of up to 32 items one run of minimum length reaches it. On the bfi data (25 six-point
        items read as one block) 7 of the 2,800 respondents (0.25%) are flagged (see the
        tests).
    cross_blocks : {"auto", False, True}, default "auto"
        Follow runs across block boundaries. With False a run ends where a block (a grid or
        page) ends: the patterns looked for are drawn on one grid, the first answer on a new
        page is not visually next to the last one of the page before, and blocks may be shown
        in a different order to each respondent. True follows runs through the whole
        questionnaire, as for one shown as a list. ``"auto"`` (the default) keeps runs within
        blocks when some block is as long as the shortest counted run, and otherwise follows
        them across blocks, so that a questionnaire of short blocks (five-item scales on
        their own pages) is still judged rather than left out.

    Notes
    -----
    Why these lengths. Each rule predicts every answer once a few have set it up (two for
    steps and period 2, three for period 3); the defaults ask for six predicted answers in a
    row, each of which a uniformly random answerer on 5 points gives with probability 1/5
    (1/5 or 2/5 for the first step). The chance that such an answerer produces at least one
    counted run, computed exactly by :func:`chance_of_pattern` (checked against a simulation
    in the tests), for items in one block:

    ==========================  =======  =======  =======  ========
    5 points, rule (length)     10       25       50       100 items
    ==========================  =======  =======  =======  ========
    steps (8)                   0.005%   0.030%   0.071%   0.15%
    period 2 (8)                0.013%   0.075%   0.18%    0.38%
    period 3 (9)                0.011%   0.085%   0.21%    0.45%
    any of the three            0.029%   0.19%    0.45%    0.98%
    ==========================  =======  =======  =======  ========

    On 7 points the chances are about a seventh of these (0.065% for any rule on 50 items). A random answerer is therefore rarely
    scored above 0, and this index is not meant to catch random answering (the consistency
    and outlier indices do); it catches respondents who draw patterns. Attentive respondents
    who use only two neighbouring answers (3,4,4,3,...) produce period-2 and period-3 runs
    far more often than random answerers, which is why one run is not enough for a flag.

    Not applicable: no block (or, with ``cross_blocks``, the questionnaire) has as many
    content items as the shortest minimum length. Not assessed: the respondent has no stretch
    of that many answered items in a row within a block.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455. (Careless responding in general and the case for
    screening with several kinds of index; the rules, lengths and cut-off here are Heedful's.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i:02d}"} for i in range(1, 21)]})
    >>> answers = np.array([
    ...     [2, 4, 3, 3, 4, 5, 4, 3, 2, 1, 2, 3, 4, 5, 4, 1, 2, 2, 3, 5],
    ...     [1, 3, 5, 1, 3, 5, 1, 3, 5, 1, 3, 5, 2, 2, 4, 1, 5, 3, 3, 2]])
    >>> result = SequencePattern().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.6, 0.6], [True, True])
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answers step up and down by one (3,4,5,4,3,2,...) on 12 items in a row, q04 to q15;
    60% of answers in patterned runs (flagged from 25%)
    >>> print(result.sentence_for(1))  # doctest: +NORMALIZE_WHITESPACE
    answers repeat a cycle of three (1,3,5,1,3,5,...) on 12 items in a row, q01 to q12;
    60% of answers in patterned runs (flagged from 25%)
    """

    name = "sequence_pattern"
    family = "invariance"
    summary = "Share of answers in runs of steps by one or short repeated cycles."
    reference = (
        "Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data. "
        "Psychological Methods, 17(3), 437-455."
    )
    parameter_constraints = {
        "min_step_run": Interval(int, 3, None),
        "min_period_2_run": Interval(int, 4, None),
        "min_period_3_run": Interval(int, 6, None),
        "share_cutoff": Interval(float, 0, 1, closed="right"),
        "cross_blocks": Options(("auto", False, True)),
    }

    def __init__(
        self,
        *,
        min_step_run: int = 8,
        min_period_2_run: int = 8,
        min_period_3_run: int = 9,
        share_cutoff: float = 0.25,
        cross_blocks: bool | str = "auto",
    ):
        self.min_step_run = min_step_run
        self.min_period_2_run = min_period_2_run
        self.min_period_3_run = min_period_3_run
        self.share_cutoff = share_cutoff
        self.cross_blocks = cross_blocks

    def _min_lengths(self) -> tuple[int, int, int]:
        return int(self.min_step_run), int(self.min_period_2_run), int(self.min_period_3_run)

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        columns = instrument.content_items
        shortest = min(self._min_lengths())
        cross = self.cross_blocks is True
        starts = _block_starts(instrument, columns, cross)
        longest_block = int(np.diff(np.r_[np.flatnonzero(starts), len(columns)]).max(initial=0))
        if self.cross_blocks == "auto" and longest_block < shortest:
            cross = True
            starts = _block_starts(instrument, columns, cross)
            longest_block = len(columns)
        in_runs = np.zeros(n, dtype=np.int64)
        answered = np.zeros(n, dtype=np.int64)
        has_stretch = np.zeros(n, dtype=bool)
        best_rule = np.full(n, -1, dtype=np.int64)
        best_length = np.zeros(n, dtype=np.int64)
        best_end = np.zeros(n, dtype=np.int64)
        values = np.full((n, _VALUES_SHOWN), -1, dtype=np.int64)
        last = np.zeros(n, dtype=np.int64)
        if longest_block >= shortest:
            for rows in row_slices(n):
                found = self._runs(instrument, matrix.answers[rows][:, columns], columns, starts)
                (
                    in_runs[rows], answered[rows], has_stretch[rows],
                    best_rule[rows], best_length[rows], best_end[rows], values[rows], last[rows],
                ) = found
        if longest_block < shortest:
            if cross or starts.sum() <= 1:
                why = (
                    f"fewer than {shortest} items other than attention checks; the shortest "
                    f"run counted is {shortest} items"
                )
            else:
                why = (
                    f"no block has {shortest} or more items other than attention checks; the "
                    f"shortest run counted is {shortest} items, and runs are not followed "
                    "across blocks unless cross_blocks is set"
                )
            mark(states, reasons, slice(None), State.NOT_APPLICABLE, why)
        else:
            mark(states, reasons, answered == 0, State.NOT_ASSESSED, "no item answered")
            mark(
                states, reasons, (answered > 0) & ~has_stretch,
                State.NOT_ASSESSED,
                f"no {shortest} answered items in a row"
                + ("" if cross else " within a block"),
            )
        share = np.divide(in_runs, answered, out=np.zeros(n), where=answered > 0)
        rule_names = np.array([*RULES, None], dtype=object)
        first = np.where(best_rule >= 0, best_end - best_length + 1, 0)
        return self._result(
            instrument,
            scores=share,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "share_in_runs": share,
                "items_in_runs": in_runs,
                "items_answered": answered,
                "rule": rule_names[best_rule],
                "run_length": best_length,
                "first_item": columns[first] if len(columns) else first,
                "last_item": columns[best_end] if len(columns) else best_end,
                "run_answers": values,
                "last_answer": last,
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    def _runs(
        self, instrument: Instrument, raw: np.ndarray, columns: np.ndarray, starts: np.ndarray
    ) -> tuple[np.ndarray, ...]:
        """Counted runs of one slice of respondents (raw: (rows, k) content answers).

        Most respondents hold no run that could count; a cheap necessary condition
        (:meth:`_candidates`) finds the others, and only those are read run by run
        (:meth:`_analyse`). The work is done item-major, (k, rows), so that each step runs
        along contiguous memory.
        """
        k, rows = raw.shape[1], raw.shape[0]
        x = np.ascontiguousarray(raw.T)
        answered = x != MISSING
        # Some stretch of the shortest counted length answered within a block.
        shortest = min(self._min_lengths())
        whole = _held_for(answered, shortest)
        inside = np.zeros(k, dtype=bool)  # window ends whose window lies within one block
        inside[shortest - 1 :] = _held_for(~starts[:, None], shortest - 1)[shortest - 1 :, 0]
        in_runs = np.zeros(rows, dtype=np.int64)
        best_rule = np.full(rows, -1, dtype=np.int64)
        best_length = np.zeros(rows, dtype=np.int64)
        best_end = np.zeros(rows, dtype=np.int64)
        values = np.full((rows, _VALUES_SHOWN), -1, dtype=np.int64)
        last = x[0].astype(np.int64)  # the answer at best_end (0) where no run counts
        pick = np.flatnonzero(self._candidates(instrument, x, answered, columns))
        if len(pick):
            (
                in_runs[pick], best_rule[pick], best_length[pick], best_end[pick],
                values[pick], last[pick],
            ) = self._analyse(instrument, x[:, pick], columns, starts)
        has_stretch = np.asarray(whole[inside].any(axis=0))
        return (
            in_runs,
            answered.sum(axis=0),
            has_stretch,
            best_rule,
            best_length,
            best_end,
            values,
            last,
        )

    def _candidates(
        self, instrument: Instrument, x: np.ndarray, answered: np.ndarray, columns: np.ndarray
    ) -> np.ndarray:
        """Respondents (x: (k, rows) raw answers) who may hold a counted run: a necessary
        condition, blocks ignored.

        A counted run of a rule with minimum length L and period p (1 for steps) spans an
        L-item window ending at every item from its L-th to its last; in each such window
        the rule holds on the last L - p items (answered, one step or equal to the answer p
        back). The run holds two neighbouring answers that differ, raw and after reverse
        keying (else it is all one answer), and every pair of neighbours in the run lies in
        one of those windows; so some window has the rule held and a raw difference, and
        some window has the rule held and a keyed difference.
        """
        k, rows = x.shape
        low = instrument.lowest[columns].astype(np.int16)[:, None]
        high = instrument.highest[columns].astype(np.int16)[:, None]
        wide = x.astype(np.int16)
        keyed = np.where(instrument.keyed[columns][:, None] == -1, (low + high) - wide, wide)
        differs = np.zeros((k, rows), dtype=bool)
        differs[1:] = x[1:] != x[:-1]
        keyed_differs = np.zeros((k, rows), dtype=bool)
        keyed_differs[1:] = keyed[1:] != keyed[:-1]
        candidate = np.zeros(rows, dtype=bool)
        for period, minimum in zip((1, 2, 3), self._min_lengths(), strict=True):
            if minimum > k:
                continue
            holds = np.zeros((k, rows), dtype=bool)
            both = answered[period:] & answered[:-period]
            if period == 1:
                holds[1:] = both & (np.abs(wide[1:] - wide[:-1]) == 1)
            else:
                holds[period:] = both & (x[period:] == x[:-period])
            window = _held_for(holds, minimum - period)
            if not window.any():
                continue
            found = (window & ~_held_for(~keyed_differs, minimum - 1)).any(axis=0)
            if period > 1:  # a step always differs raw
                found &= (window & ~_held_for(~differs, minimum - 1)).any(axis=0)
            candidate |= found
        return candidate

    def _analyse(
        self, instrument: Instrument, raw_by_item: np.ndarray, columns: np.ndarray,
        starts: np.ndarray,
    ) -> tuple[np.ndarray, ...]:
        """The counted runs of the given respondents (raw_by_item: (k, rows) raw answers).

        Every run length comes from one cumulative maximum (see :func:`_in_a_row`).
        """
        k, rows = raw_by_item.shape
        x = raw_by_item.astype(np.int16)
        answered = x != MISSING
        low = instrument.lowest[columns].astype(np.int16)[:, None]
        high = instrument.highest[columns].astype(np.int16)[:, None]
        keyed = np.where(instrument.keyed[columns][:, None] == -1, (low + high) - x, x)
        # Answered items in a row within a block, ending at each item.
        stretch = _in_a_row(answered, starts)
        # Steps: one up or down from the previous answer; a step continues the run of the step
        # before when it keeps the direction, or turns at an end of the scale.
        rise = np.zeros((k, rows), dtype=np.int16)
        rise[1:] = x[1:] - x[:-1]
        step = (stretch >= 2) & (np.abs(rise) == 1)
        chained = np.zeros((k, rows), dtype=bool)
        chained[2:] = (
            step[2:] & step[1:-1]
            & ((rise[2:] == rise[1:-1]) | (x[1:-1] == low[1:-1]) | (x[1:-1] == high[1:-1]))
        )
        lengths = np.zeros((len(RULES), k, rows), dtype=np.int16)
        lengths[0] = np.where(step, 2 + _in_a_row(chained), 0)
        for rule, period in ((1, 2), (2, 3)):
            repeat = np.zeros((k, rows), dtype=bool)
            repeat[period:] = (stretch[period:] > period) & (x[period:] == x[:-period])
            lengths[rule] = np.where(repeat, period + _in_a_row(repeat), 0)
        # A run ends where the next item does not extend it by one.
        following = np.zeros_like(lengths)
        following[:, :-1] = lengths[:, 1:]
        ends = (lengths > 0) & (following != lengths + 1)
        # A run is all one answer when it is no longer than the run of equal answers ending
        # with it; likewise after reverse keying.
        same = np.zeros((k, rows), dtype=bool)
        same[1:] = x[1:] == x[:-1]
        equal_raw = 1 + _in_a_row(same)
        same[1:] = keyed[1:] == keyed[:-1]
        equal_keyed = 1 + _in_a_row(same)
        counted = np.zeros((len(RULES), k, rows), dtype=np.int16)  # length at counted run ends
        for rule, minimum in enumerate(self._min_lengths()):
            length = lengths[rule]
            counts = ends[rule] & (length >= minimum) & (equal_raw < length) & (equal_keyed < length)
            counted[rule] = np.where(counts, length, 0)
        # Item j lies in a counted run when a run ending at j or later starts at j or earlier.
        position = np.arange(k, dtype=np.int16)[:, None]
        widest = counted.max(axis=0)
        run_start = np.where(widest > 0, position - widest + 1, k).astype(np.int16)
        for j in range(k - 2, -1, -1):  # earliest start of the runs ending at j or later
            np.minimum(run_start[j + 1], run_start[j], out=run_start[j])
        in_runs = (run_start <= position).sum(axis=0, dtype=np.int64)
        # The longest counted run (the first rule, then the earliest, on ties): argmax finds the
        # first maximum of each respondent's lengths laid out rule after rule.
        by_respondent = counted.transpose(2, 0, 1).reshape(rows, len(RULES) * k)
        where = by_respondent.argmax(axis=1)
        best_length = by_respondent[np.arange(rows), where].astype(np.int64)
        found = best_length > 0
        best_rule = np.where(found, where // k, -1)
        best_end = np.where(found, where % k, 0)
        everyone = np.arange(rows)
        shown = best_end[:, None] - best_length[:, None] + 1 + np.arange(_VALUES_SHOWN)
        values = np.where(
            shown <= best_end[:, None], x[np.clip(shown, 0, k - 1), everyone[:, None]], -1
        ).astype(np.int64)
        last = x[best_end, everyone].astype(np.int64)
        return in_runs, best_rule, best_length, best_end, values, last

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        share = (
            f"{evidence['share_in_runs']:.0%} of answers in patterned runs "
            f"(flagged from {evidence['share_cutoff']:.0%})"
        )
        rule = evidence["rule"]
        if rule is None:
            return f"no run of answers following a step or cycle pattern; {share}"
        answers = [v for v in evidence["run_answers"] if v >= 0]
        length = evidence["run_length"]
        if rule == "steps":
            # Steps of one without a turn move the answer by length - 1 in all.
            rise = evidence["last_answer"] - answers[0]
            what = "step up and down by one" if abs(rise) != length - 1 else (
                "step up by one" if rise > 0 else "step down by one"
            )
        elif rule == "period_2":
            what = "alternate between two answers"
        else:
            what = "repeat a cycle of three"
        quoted = ",".join(str(v) for v in answers) + (",..." if length > len(answers) else "")
        return (
            f"answers {what} ({quoted}) on {length} items in a row, "
            f"{item_range(item_ids, evidence['first_item'], evidence['last_item'])}; {share}"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        share = concat(
            percent(evidence["share_in_runs"]), " of answers in patterned runs (flagged from ",
            percent(evidence["share_cutoff"]), ")",
        )
        rule = evidence["rule"]
        n = len(rule)
        answers = evidence["run_answers"]
        present = [answers[:, j] >= 0 for j in range(answers.shape[1])]
        shown = counted(present, n)
        length = evidence["run_length"]
        rise = evidence["last_answer"] - answers[:, 0] if answers.shape[1] else np.zeros(n)
        what = choose(
            rule == "steps",
            choose(
                np.abs(rise) != length - 1, "step up and down by one",
                choose(rise > 0, "step up by one", "step down by one"),
            ),
            choose(rule == "period_2", "alternate between two answers", "repeat a cycle of three"),
        )
        quoted = concat(
            joined([plain(answers[:, j]) for j in range(answers.shape[1])], present, ",", n),
            choose(length > shown, ",...", ""),
        )
        none = is_none(rule)
        first = np.where(none, 0, evidence["first_item"]).astype(np.intp)
        last = np.where(none, 0, evidence["last_item"]).astype(np.intp)
        return choose(
            none,
            concat("no run of answers following a step or cycle pattern; ", share),
            concat(
                "answers ", what, " (", quoted, ") on ", plain(length), " items in a row, ",
                item_ranges(item_ids, first, last), "; ", share,
            ),
        )


def _in_a_row(condition: np.ndarray, starts: np.ndarray | None = None) -> np.ndarray:
    """How many consecutive items up to each one meet ``condition`` (k, rows), counting again
    from the items marked in ``starts`` (k,): j minus the last position before j where the
    condition failed (or the block began), found by a cumulative maximum."""
    k = condition.shape[0]
    position = np.arange(k, dtype=np.int16)[:, None]
    broken = np.where(condition, np.int16(-1), position)
    if starts is not None:
        np.maximum(broken, np.where(starts[:, None], position - 1, -1), out=broken)
    for j in range(1, k):  # a cumulative maximum; item by item is faster along this axis
        np.maximum(broken[j - 1], broken[j], out=broken[j])
    # Where the condition fails, the last failure is j itself: the count is 0.
    return np.subtract(position, broken, out=broken)


def _held_for(condition: np.ndarray, width: int) -> np.ndarray:
    """True at each item (axis 0) where ``condition`` holds on it and the ``width - 1`` items
    before it (False on the first ``width - 1`` items), by doubling the window."""
    out = condition.copy()
    have = 1
    while have < width:
        more = min(have, width - have)
        out[more:] = out[more:] & out[:-more]
        out[:more] = False
        have += more
    return out


def _block_starts(instrument: Instrument, columns: np.ndarray, cross_blocks: bool) -> np.ndarray:
    """True at each content item (in presentation order) that starts a block."""
    starts = np.zeros(len(columns), dtype=bool)
    if len(columns) == 0:
        return starts
    starts[0] = True
    if not cross_blocks:
        labels = [instrument.items[c].block for c in columns]
        starts[1:] = [a != b for a, b in zip(labels[:-1], labels[1:], strict=True)]
    return starts
