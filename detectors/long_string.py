"""Long-string: the longest run of identical consecutive answers in presentation order."""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache
from typing import Any

import numpy as np

from ._base import (
    Detector,
    DetectorResult,
    Interval,
    State,
    item_range,
    item_ranges,
    mark,
    new_states,
)
from ._text import TextColumn, concat, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["LongString", "chance_of_run", "default_run_cutoff"]


def chance_of_run(n_items: int, length: int, repeat_probability: float) -> float:
    """Probability that a sequence of ``n_items`` answers holds a run of at least ``length``
    identical answers, when each answer repeats the previous one with ``repeat_probability``.

    Exact, by a Markov chain over the length of the current run (states 1..length-1, plus the
    absorbing state "a run of ``length`` was reached").
    """
    if length <= 1:
        return 1.0
    if length > n_items:
        return 0.0
    alive = np.zeros(length - 1)
    alive[0] = 1.0  # after the first answer the current run has length 1
    for _ in range(n_items - 1):
        grown = alive * repeat_probability
        moved = np.empty_like(alive)
        moved[0] = alive.sum() * (1.0 - repeat_probability)
        moved[1:] = grown[:-1]
        alive = moved  # grown[-1] reached ``length`` and left the chain
    return float(1.0 - alive.sum())


@lru_cache(maxsize=256)
def default_run_cutoff(n_items: int, repeat_probability: float, alpha: float) -> int:
    """The shortest run length whose chance (see :func:`chance_of_run`) is at most ``alpha``;
    ``n_items`` when even a run over every item is more likely than that."""
    for length in range(2, n_items + 1):
        if chance_of_run(n_items, length, repeat_probability) <= alpha:
            return length
    return max(n_items, 2)


#: Quantile of the respondents' repeat shares that sets the sample's repeat model (Heedful's
#: choice: high enough to cover the ordinary respondents who repeat most, below the share of
#: careless respondents a sample commonly holds, about one in ten).
MODEL_QUANTILE = 0.9


class LongString(Detector):
    """Longest run of identical consecutive answers (long-string analysis).

    The answers are read in presentation order, attention-check items left out, and compared
    **raw** (reverse keying is ignored: the index is about the answer column ticked, not content).
    A missing answer ends a run. The score is the length of the longest run; the evidence gives
    its answer and its first and last item.

    Parameters
    ----------
    run_cutoff : int >= 2 or None, default None
        Flag a respondent whose longest run is at least this long. None derives it from the
        number of items with ``repeat_probability`` and ``alpha`` (below).
    repeat_probability : float in (0, 1), default 0.5
        For the derived cut-off: the chance that an attentive respondent repeats the answer they
        just gave. 0.5 is Heedful's deliberately generous choice (an attentive respondent on a
        homogeneous grid repeats often; uniformly random answering on 5 points repeats with
        0.2), so the default errs towards not flagging.
    alpha : float in (0, 1), default 0.001
        For the derived cut-off: the largest accepted chance of a run that long under that model.

    Notes
    -----
    Why the default cut-off scales with the number of items: a run of a given length is more
    likely somewhere in a long questionnaire than in a short one. If each answer repeats the one
    before with probability p, the chance that k answers hold a run of at least L is computed
    exactly (:func:`chance_of_run`), and the cut-off is the smallest L with chance <= alpha.
    With p = 0.5 and alpha = 0.001 this gives 10 for 10 items (capped at the number of items,
    see below), 14 for 25 items, 16 for 50 and 18 for 240: roughly log2(k / alpha), so the cut-off
    grows slowly with test length, as published per-option limits do. When even a run over
    every item is more likely than ``alpha`` (very short questionnaires), the cut-off is the
    number of items: only a run through the whole questionnaire is flagged. The distribution of
    longest runs in the sample itself is the better guide (Johnson 2005): look at it and set
    ``run_cutoff`` where it drops off.

    Not assessed: a respondent with no answered item. Not applicable: fewer than 2 items.

    References
    ----------
    Johnson, J. A. (2005). Ascertaining the validity of individual protocols from Web-based
    personality inventories. Journal of Research in Personality, 39(1), 103-129.

    Examples
    --------
    >>> chance_of_run(4, 4, 0.5)
    0.125
    >>> default_run_cutoff(50, 0.5, 0.001)
    16
    """

    name = "long_string"
    family = "invariance"
    summary = "Longest run of identical consecutive answers in presentation order."
    reference = (
        "Johnson, J. A. (2005). Ascertaining the validity of individual protocols from Web-based "
        "personality inventories. Journal of Research in Personality, 39(1), 103-129."
    )
    calibration = "reference_within_own"
    cutoff_setting = cutoff_evidence = "run_cutoff"
    parameter_constraints = {
        "run_cutoff": Interval(int, 2, None, allow_none=True),
        "repeat_probability": Interval(float, 0, 1, closed="neither"),
        "alpha": Interval(float, 0, 1, closed="neither"),
    }

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return np.ceil(cutoffs).astype(np.int64)  # runs are whole numbers of items

    def __init__(
        self,
        *,
        run_cutoff: int | None = None,
        repeat_probability: float = 0.5,
        alpha: float = 0.001,
    ):
        self.run_cutoff = run_cutoff
        self.repeat_probability = repeat_probability
        self.alpha = alpha

    def cutoff_for(self, n_items: int) -> int:
        if self.run_cutoff is not None:
            return int(self.run_cutoff)
        return default_run_cutoff(n_items, self.repeat_probability, self.alpha)

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        columns = instrument.content_items
        n, m = matrix.n_respondents, len(columns)
        states, reasons = new_states(n)
        cutoff = self.cutoff_for(m)
        best = np.zeros(n, dtype=np.int16)
        best_end = np.zeros(n, dtype=np.int16)
        repeats = np.zeros(n, dtype=np.int16)
        pairs = np.zeros(n, dtype=np.int16)
        value = np.zeros(n, dtype=np.int16)
        if m < 2:
            mark(states, reasons, slice(None), State.NOT_APPLICABLE, "fewer than 2 items")
        else:
            # Item-major (items, respondents): each item's answers lie side by side.
            answers = np.ascontiguousarray(matrix.answers[:, columns].T)
            answered = answers != MISSING
            run = answered[0].astype(np.int16)
            best[:] = run
            for j in range(1, m):
                same = answered[j] & (answers[j] == answers[j - 1])
                repeats += same
                pairs += answered[j] & answered[j - 1]
                run = np.where(same, run + 1, answered[j]).astype(np.int16)
                np.copyto(best_end, j, where=run > best)
                np.maximum(best, run, out=best)
            value = answers[best_end, np.arange(n)].astype(np.int16)
            mark(states, reasons, best == 0, State.NOT_ASSESSED, "no item answered")
        best_start = best_end - np.maximum(best, 1) + 1
        return self._result(
            instrument,
            scores=best,
            cutoffs=float(cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "run_length": best.astype(np.int64),
                "answer": value.astype(np.int64),
                "first_item": columns[best_start] if m else best_start,
                "last_item": columns[best_end] if m else best_end,
                "run_cutoff": np.full(n, cutoff, dtype=np.int64),
                "repeat_share": np.divide(
                    repeats, pairs, out=np.full(n, np.nan), where=pairs > 0
                ),
                "items_answered": answered.sum(axis=0) if m >= 2 else np.zeros(n, np.int64),
            },
        )

    @classmethod
    def model_cutoff(cls, result: DetectorResult, keep: np.ndarray, share: float) -> float | None:
        """The repeat model fitted to the sample: the shortest run whose chance is at most
        ``share`` when each answer repeats the previous one with probability q, q the
        ``MODEL_QUANTILE`` quantile of the respondents' own shares of repeated answers (so the
        model allows for respondents who repeat more than most, while careless respondents in
        the top of the sample do not set it), for the most common number of answered items."""
        repeat = result.evidence["repeat_share"][keep]
        answered = result.evidence["items_answered"][keep]
        repeat = repeat[np.isfinite(repeat)]
        if len(repeat) == 0 or len(answered) == 0:
            return None
        q = float(np.clip(np.quantile(repeat, MODEL_QUANTILE), 0.01, 0.99))
        typical = int(np.bincount(answered.astype(np.int64)).argmax())
        if typical < 2:
            return None
        return float(default_run_cutoff(typical, round(q, 4), share))

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        return (
            f"same answer, {evidence['answer']}, on {evidence['run_length']} items in a row, "
            f"{item_range(item_ids, evidence['first_item'], evidence['last_item'])} "
            f"(flagged from {evidence['run_cutoff']} in a row)"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        return concat(
            "same answer, ", plain(evidence["answer"]), ", on ", plain(evidence["run_length"]),
            " items in a row, ",
            item_ranges(item_ids, evidence["first_item"], evidence["last_item"]),
            " (flagged from ", plain(evidence["run_cutoff"]), " in a row)",
        )
