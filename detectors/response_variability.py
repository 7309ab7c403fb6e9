"""Response variability: the within-person standard deviation of the raw answers."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, fixed, general, is_none, mapped, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["ResponseVariability", "DDOF"]

#: Divisor n - 1 (the sample standard deviation, ``numpy.std(x, ddof=1)``).
DDOF = 1

#: The name instrument.blocks gives the single block of an instrument without blocks.
_WHOLE_QUESTIONNAIRE = "(whole questionnaire)"


class ResponseVariability(Detector):
    """Intra-individual response variability: how little a respondent's raw answers vary.

    For each respondent, the standard deviation of the **raw** answers (reverse keying is not
    applied; attention-check items are left out) over all answered content items, and over the
    answered items of each block (grid or page) that has at least ``min_items`` of them::

        SD = sqrt( sum_j (x_j - mean(x))^2 / (m - 1) )      (m answered items; ddof = 1)

    The divisor is m - 1 (:data:`DDOF`), so ``[1, 2, 3, 4, 5]`` gives 1.58114, as
    ``numpy.std(x, ddof=1)``.

    The score is **the negative of the overall SD**, so that a higher score is more suspect; a
    respondent is flagged when the overall SD is at most ``sd_cutoff`` (score >= -``sd_cutoff``).
    Invariance is often local to one grid, so the SD of every judged block is computed too, and
    the evidence names the block with the lowest SD beside the overall SD. The block minimum is
    deliberately not the score: on short blocks made of one scale, attentive respondents often
    answer alike (in the bfi data, 5-item blocks, 7.9% of respondents have one block with SD 0
    and 24% one with SD <= 0.5, against 0.2% with an overall SD <= 0.5); a whole grid answered
    alike is what ``straightlining`` judges.

    Parameters
    ----------
    sd_cutoff : float >= 0, default 0.5
        Flag when the overall SD is at or below this many answer points. Heedful's choice; the
        index has no fixed published cut-off to our knowledge (from memory). Why 0.5: with
        ddof = 1, m answers all equal but one that is one point off have SD = 1/sqrt(m), which
        is 0.5 for 4 items and less for more; answers split evenly between two neighbouring
        options have SD of about 0.5 to 0.58. So SD <= 0.5 means "nearly every answer on one
        option". Under uniformly random answering on 5 points the mean SD of 4 answers is 1.34,
        and a block of 4 items has SD <= 0.5 with probability 37/625 = 5.9% (all 625 patterns
        enumerated; compare 5/625 = 0.8% for one answer throughout). On scales with many more
        points, raise it in proportion to the number of points.
    min_items : int >= 2, default 4
        A respondent is assessed only with at least this many answered content items, and a
        block is judged only with at least this many answered items: an SD of two or three
        answers says little, and a summed scale wants at least 4 items (common practice, no
        source).

    Notes
    -----
    Items with different answer formats are compared on their raw codes, so the SD mixes
    units; use blocks of one format. Low variability also arises honestly on a short grid of
    very similar statements, which is why the cut-off is low and the index is one kind of
    evidence among several.

    Not applicable: fewer than ``min_items`` content items. Not assessed: fewer than
    ``min_items`` answered content items.

    References
    ----------
    Dunn, A. M., Heggestad, E. D., Shanock, L. R., & Theilgard, N. (2018). Intra-individual
    response variability as an indicator of insufficient effort responding: Comparison to
    other indicators and relationships with individual differences. Journal of Business and
    Psychology, 33(1), 105-121. (Details from memory, not checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"a{i}", "block": "grid-a"} for i in range(4)]
    ...     + [{"id": f"b{i}", "block": "grid-b"} for i in range(4)]})
    >>> answers = np.array([[3, 3, 4, 3, 3, 3, 3, 4], [1, 5, 2, 4, 3, 1, 5, 2]])
    >>> result = ResponseVariability().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.round(3).tolist(), result.flags.tolist()
    ([-0.463, -1.642], [True, False])
    >>> result.sentence_for(0)
    "answers vary little: SD 0.46 over all 8 answered items; lowest in block 'grid-a', 0.50 (4 \
answered items) (flagged at SD 0.5 or less)"
    """

    name = "response_variability"
    family = "invariance"
    summary = "Within-person standard deviation of the raw answers, overall and per block."
    reference = (
        "Dunn, A. M., Heggestad, E. D., Shanock, L. R., & Theilgard, N. (2018). Intra-individual "
        "response variability as an indicator of insufficient effort responding. Journal of "
        "Business and Psychology, 33(1), 105-121."
    )
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "sd_cutoff"
    #: minus an SD of 0: one answer on every item
    score_maximum = 0.0
    parameter_constraints = {
        "sd_cutoff": Interval(float, 0, None),
        "min_items": Interval(int, 2, None),
    }

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cutoffs  # the score is the negative of the SD

    def __init__(self, *, sd_cutoff: float = 0.5, min_items: int = 4):
        self.sd_cutoff = sd_cutoff
        self.min_items = min_items

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        content = instrument.content_items
        blocks = {
            name: columns
            for name, columns in instrument.blocks.items()
            if len(columns) >= self.min_items and name != _WHOLE_QUESTIONNAIRE
        }
        names = list(blocks)
        overall = np.full(n, np.nan)
        answered_count = np.zeros(n, dtype=np.int64)
        block_sd = np.full((len(names), n), np.nan)
        block_count = np.zeros((len(names), n), dtype=np.int64)
        for rows in row_slices(n):
            overall[rows], answered_count[rows] = _sd(
                _answers(matrix, rows, content), self.min_items
            )
            for b, columns in enumerate(blocks.values()):
                block_sd[b, rows], block_count[b, rows] = _sd(
                    _answers(matrix, rows, columns), self.min_items
                )
        lowest_block = np.full(n, None, dtype=object)
        lowest_block_sd = np.full(n, np.nan)
        lowest_block_items = np.zeros(n, dtype=np.int64)
        for b, name in enumerate(names):
            # Strictly lower: the first block in order wins ties.
            lower = ~np.isnan(block_sd[b]) & ~(block_sd[b] >= lowest_block_sd)
            lowest_block[lower] = name
            lowest_block_sd[lower] = block_sd[b, lower]
            lowest_block_items[lower] = block_count[b, lower]
        if len(content) < self.min_items:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"fewer than {self.min_items} items other than attention checks",
            )
        else:
            mark(
                states, reasons, answered_count < self.min_items, State.NOT_ASSESSED,
                f"fewer than {self.min_items} answered items",
            )
        return self._result(
            instrument,
            scores=-overall,
            cutoffs=-float(self.sd_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "overall_sd": overall,
                "items_answered": answered_count,
                "lowest_block": lowest_block,
                "lowest_block_sd": lowest_block_sd,
                "lowest_block_items": lowest_block_items,
                "sd_cutoff": np.full(n, float(self.sd_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        overall, cutoff = evidence["overall_sd"], evidence["sd_cutoff"]
        block, block_sd = evidence["lowest_block"], evidence["lowest_block_sd"]
        whole = f"{overall:.2f} over all {evidence['items_answered']} answered items"
        tail = f" (flagged at SD {cutoff:g} or less)"
        lead = "answers vary little" if overall <= cutoff else "answers vary"
        if block is None:
            return f"{lead}: SD {whole}{tail}"
        return (
            f"{lead}: SD {whole}; lowest in block {block!r}, {block_sd:.2f} "
            f"({evidence['lowest_block_items']} answered items){tail}"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        overall, cutoff = evidence["overall_sd"], evidence["sd_cutoff"]
        block = evidence["lowest_block"]
        head = concat(
            choose(overall <= cutoff, "answers vary little", "answers vary"), ": SD ",
            fixed(overall, 2), " over all ", plain(evidence["items_answered"]), " answered items",
        )
        return concat(
            head,
            choose(is_none(block), "", concat(
                "; lowest in block ", mapped(block, repr), ", ",
                fixed(evidence["lowest_block_sd"], 2), " (",
                plain(evidence["lowest_block_items"]), " answered items)",
            )),
            " (flagged at SD ", general(cutoff), " or less)",
        )


def _answers(matrix: ResponseMatrix, rows: slice, columns: np.ndarray) -> np.ndarray:
    return matrix.answers[rows][:, columns]


def _sd(answers: np.ndarray, min_items: int) -> tuple[np.ndarray, np.ndarray]:
    """Row-wise SD (ddof = :data:`DDOF`) of the answered codes, NaN below ``min_items``
    answers; counts."""
    answered = answers != MISSING
    count = answered.sum(axis=1)
    enough = count >= min_items
    safe = np.maximum(count, 1)
    values = np.where(answered, answers, 0).astype(np.float64)
    mean = values.sum(axis=1) / safe
    deviations = np.where(answered, values - mean[:, None], 0.0)
    variance = (deviations * deviations).sum(axis=1) / np.maximum(count - DDOF, 1)
    return np.where(enough, np.sqrt(variance), np.nan), count
