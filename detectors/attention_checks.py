"""Attention checks: instructed-response items answered otherwise than instructed."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, Options, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, is_none, joined, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["AttentionChecks"]

#: Values of the ``unanswered`` setting.
UNANSWERED_FAILS, UNANSWERED_NOT_COUNTED = "failed", "not_counted"


class AttentionChecks(Detector):
    """Failed attention checks: instructed-response items not answered as instructed.

    An attention check is an item whose text tells the respondent which answer to give ("Please
    answer 'Agree' here"); the instrument gives that answer as the item's ``instructed_answer``.
    A check is *failed* when it was answered with any other option, or, by default, left
    unanswered. The score is the number of failed checks (a count rather than a share: every
    respondent sees the same checks, and one failure means the same thing whether the
    instrument has two checks or five); a respondent is flagged at ``min_failures`` or more.
    The evidence names each failed check with the answer asked for and the answer given, with
    the answer labels when the item's response format has them.

    Parameters
    ----------
    min_failures : int >= 1, default 1
        Flag a respondent who failed at least this many checks. Heedful's choice: an
        instructed item has one correct answer that anyone who read it can give, so a single
        failure is already evidence of not reading, and the recommendation to include such items
        (Meade & Craig, 2012) is a recommendation to act on them. Raise it on an instrument with
        several checks to allow for one slip of the finger.
    unanswered : {"failed", "not_counted"}, default "failed"
        How an unanswered check is judged. ``"failed"``: the instruction asked for an answer,
        and skipping it is not following it; a respondent who skips through a survey without
        reading skips the checks too, so not counting them would let the least attentive pass.
        ``"not_counted"``: the check is left out of the count (and the number of checks judged),
        for surveys where a respondent may legitimately skip any item, or where the platform
        records a check as unanswered when it was not shown.

    Notes
    -----
    A check only measures attention if its instruction is unambiguous and shown on the same page
    as ordinary items; an instructed answer that is also the answer a careless respondent would
    tick anyway (the midpoint, or the option a straight line runs through) catches fewer of them.
    Respondents who fail a check are not necessarily careless throughout, and attentive ones
    occasionally misclick: a flag is evidence for a reviewer's decision, not a verdict.

    Not applicable: the instrument has no attention-check items. Not assessed: the respondent
    answered no item at all (an empty record), or, with ``unanswered="not_counted"``, answered
    none of the checks.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example",
    ...     "response_format": {"points": 5, "labels": [
    ...         "Strongly disagree", "Disagree", "Neutral", "Agree", "Strongly agree"]},
    ...     "items": [{"id": "q1"}, {"id": "check1", "instructed_answer": 4}, {"id": "q2"},
    ...               {"id": "check2", "instructed_answer": 1}]})
    >>> answers = np.array([[3, 4, 2, 1], [3, 2, 2, 1], [5, np.nan, 5, 2]])
    >>> result = AttentionChecks().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.0, 1.0, 2.0], [False, True, True])
    >>> result.sentence_for(1)
    'failed 1 of 2 attention checks: check1 asked for 4 (Agree), answered 2 (Disagree)'
    >>> result.sentence_for(0)
    'passed all 2 attention checks'
    """

    name = "attention_checks"
    family = "effort"
    summary = "Number of attention-check (instructed-response) items not answered as instructed."
    reference = (
        "Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data. "
        "Psychological Methods, 17(3), 437-455."
    )
    parameter_constraints = {
        "min_failures": Interval(int, 1, None),
        "unanswered": Options((UNANSWERED_FAILS, UNANSWERED_NOT_COUNTED)),
    }

    def __init__(self, *, min_failures: int = 1, unanswered: str = UNANSWERED_FAILS):
        self.min_failures = min_failures
        self.unanswered = unanswered

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        checks = np.flatnonzero(instrument.is_instructed)
        c = len(checks)
        items = [instrument.items[j] for j in checks]
        asked = np.array([item.instructed_answer for item in items], dtype=np.int64)
        given = matrix.answers[:, checks]
        skipped = given == MISSING
        counts_skipped = self.unanswered == UNANSWERED_FAILS
        failed = (given != asked) & (~skipped | counts_skipped)
        judged = np.full(n, c, dtype=np.int64) if counts_skipped else (~skipped).sum(axis=1)
        answered_any = np.zeros(n, dtype=bool)
        for rows in row_slices(n):
            answered_any[rows] = (matrix.answers[rows] != MISSING).any(axis=1)

        # Per check: the answer given (None when unanswered) and the labels of both answers.
        given_codes = given.astype(object)
        given_codes[skipped] = None
        given_labels = np.full((n, c), None, dtype=object)
        asked_labels = np.full(c, None, dtype=object)
        for column, item in enumerate(items):
            fmt = instrument.format_of(item)
            if fmt.labels is None:
                continue
            asked_labels[column] = fmt.labels[int(asked[column]) - fmt.lowest]
            # The trailing None is what an unanswered check (index -1) reads.
            lookup = np.array([*fmt.labels, None], dtype=object)
            position = given[:, column].astype(np.int64) - fmt.lowest
            given_labels[:, column] = lookup[np.where(skipped[:, column], -1, position)]

        if c == 0:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                "the instrument has no attention-check items",
            )
        else:
            if not counts_skipped:
                mark(states, reasons, judged == 0, State.NOT_ASSESSED, "no attention check answered")
            mark(states, reasons, ~answered_any, State.NOT_ASSESSED, "no item answered")
        return self._result(
            instrument,
            scores=failed.sum(axis=1).astype(np.float64),
            cutoffs=float(self.min_failures),
            states=states,
            reasons=reasons,
            evidence={
                "failed_count": failed.sum(axis=1).astype(np.int64),
                "checks_judged": judged.astype(np.int64),
                "check_items": _rows_of(np.array(instrument.item_ids, dtype=object)[checks], n),
                "asked": _rows_of(asked, n),
                "asked_labels": _rows_of(asked_labels, n),
                "given": given_codes,
                "given_labels": given_labels,
                "failed": failed,
                "min_failures": np.full(n, int(self.min_failures), dtype=np.int64),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        failed_count, judged = evidence["failed_count"], evidence["checks_judged"]
        checks = list(
            zip(
                evidence["check_items"], evidence["asked"], evidence["asked_labels"],
                evidence["given"], evidence["given_labels"], evidence["failed"], strict=True,
            )
        )
        noun = "attention check" if judged == 1 else "attention checks"
        if failed_count == 0:
            text = f"passed {'the' if judged == 1 else 'all'} {judged} {noun}"
        else:
            parts = []
            for item, asked, asked_label, given, given_label, failed in checks:
                if not failed:
                    continue
                answer = "left unanswered" if given is None else f"answered {_option(given, given_label)}"
                parts.append(f"{item} asked for {_option(asked, asked_label)}, {answer}")
            text = f"failed {failed_count} of {judged} {noun}: " + "; ".join(parts)
        not_counted = sum(1 for check in checks if check[3] is None and not check[5])
        if not_counted:
            text += f" ({not_counted} left unanswered, not counted)"
        if evidence["min_failures"] > 1 and failed_count:
            text += f" (flagged from {evidence['min_failures']} failed checks)"
        return text

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        failed_count, judged = evidence["failed_count"], evidence["checks_judged"]
        n = len(judged)
        noun = choose(judged == 1, "attention check", "attention checks")
        passed = concat("passed ", choose(judged == 1, "the", "all"), " ", plain(judged), " ", noun)
        parts, present = [], []
        not_counted = np.zeros(n, dtype=np.int64)
        for c in range(evidence["failed"].shape[1]):
            given, failed = evidence["given"][:, c], evidence["failed"][:, c].astype(bool)
            skipped = is_none(given)
            answer = choose(
                skipped, "left unanswered",
                concat("answered ", _options(given, evidence["given_labels"][:, c])),
            )
            parts.append(concat(
                plain(evidence["check_items"][:, c]), " asked for ",
                _options(evidence["asked"][:, c], evidence["asked_labels"][:, c]), ", ", answer,
            ))
            present.append(failed)
            not_counted += skipped & ~failed
        listing = joined(parts, present, "; ", n)
        text = choose(
            failed_count == 0, passed,
            concat("failed ", plain(failed_count), " of ", plain(judged), " ", noun, ": ", listing),
        )
        text = concat(text, choose(
            not_counted > 0, concat(" (", plain(not_counted), " left unanswered, not counted)"), ""
        ))
        few = evidence["min_failures"]
        return concat(text, choose(
            (few > 1) & (failed_count > 0), concat(" (flagged from ", plain(few), " failed checks)"),
            "",
        ))


def _option(code: int, label: str | None) -> str:
    return f"{code}" if label is None else f"{code} ({label})"


def _options(codes: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """:func:`_option` of each respondent."""
    return choose(
        is_none(labels), plain(codes), concat(plain(codes), " (", plain(labels), ")")
    )


def _rows_of(values: np.ndarray, n: int) -> np.ndarray:
    """The same row of per-check values for each of n respondents (a read-only view)."""
    return np.broadcast_to(values, (n, len(values)))
