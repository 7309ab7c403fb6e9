"""Acquiescence: agreeing with both a statement and its opposite, over the opposite pairs."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, fixed, plain
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["Acquiescence"]



class Acquiescence(Detector):
    """Acquiescence over opposite pairs: the share of answered pairs agreed with on both sides.

    An opposite pair is two items that state opposite things (given in the instrument, or
    derived within each scale as every pairing of a positively with a reverse-keyed item). A
    pair counts as answered when both items are answered; it is *agreed on both sides* when
    both **raw** answers lie strictly above the item's midpoint (lowest + highest) / 2, that is
    on the agree side, whatever the keying. Reverse keying ((lowest + highest) - x) is not
    applied: agreeing with a statement and with its opposite is the very pattern measured. The
    score is the share of answered pairs agreed on both sides.

    The evidence also gives the share of answered pairs where both raw answers lie strictly
    below the midpoint (disacquiescence), and the net acquiescence: the mean raw answer minus
    the item's midpoint over the answered pairs, each pair counting once, so positively and
    reverse-keyed items weigh equally and the content cancels out (after the net acquiescence
    of Baumgartner & Steenkamp 2001). Attention-check items never belong to a pair.

    Parameters
    ----------
    share_cutoff : float in (0, 1], default 0.6
        Flag a respondent who agreed on both sides of at least this share of the answered pairs.
        Heedful's choice; no published cut-off exists. Under uniformly random answering on 5
        points both answers of a pair lie on the agree side with probability (2/5)^2 = 0.16
        (0.18 on 7 points, 0.25 on an even number of points). For pairs that share no item the
        count is binomial, and uniformly random answering on 5 points reaches the default with
        probability 6.9% at 3 answered pairs (2 of 3), at most 3.2% from 4 pairs on and at most
        0.4% from 8 pairs on. An attentive respondent rarely agrees with both a statement and
        its opposite, so the default asks for well over three times the five-point chance.
    min_pairs : int >= 1, default 3
        Respondents with fewer answered pairs are not assessed (Heedful's default: with fewer
        pairs a single inattentive answer decides the share).

    Notes
    -----
    Acquiescence is a response style, reported in the ``style`` family; with balanced keying it
    cancels out of summed scores. Derived pairs reuse items (a scale of 3 positively and 3
    reverse-keyed items gives 9 pairs of 6 items), so their counts are not independent and the
    binomial figures above are only a guide.

    Not applicable: the instrument has no opposite pairs (name them in ``opposite_pairs``, or
    key items in both directions within a scale), or fewer than ``min_pairs``. Not assessed:
    fewer than ``min_pairs`` pairs with both items answered.

    References
    ----------
    Baumgartner, H., & Steenkamp, J.-B. E. M. (2001). Response styles in marketing research: A
    cross-national investigation. Journal of Marketing Research, 38(2), 143-156.

    Winkler, J. D., Kanouse, D. E., & Ware, J. E. (1982). Controlling for acquiescence response
    set in scale development. Journal of Applied Psychology, 67(5), 555-561.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"p{i}"} for i in range(1, 5)]
    ...     + [{"id": f"n{i}", "keyed": -1} for i in range(1, 5)],
    ...     "opposite_pairs": [[f"p{i}", f"n{i}"] for i in range(1, 5)]})
    >>> answers = np.array([[5, 4, 4, 2, 4, 5, 3, 2], [4, 2, 5, 1, 2, 4, 1, 5]])
    >>> result = Acquiescence().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.5, 0.0], [False, False])
    >>> result.sentence_for(0)
    'agreed with both statements of 2 of 4 answered opposite pairs (0.50; flagged from 0.60), \
disagreed with both in 1; mean answer 0.62 points above the midpoint'
    """

    name = "acquiescence"
    family = "inconsistency"
    summary = "Share of opposite pairs where the respondent agreed with both statements."
    reference = (
        "Baumgartner, H., & Steenkamp, J.-B. E. M. (2001). Response styles in marketing "
        "research: A cross-national investigation. Journal of Marketing Research, 38(2), 143-156."
    )
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "share_cutoff"
    #: agreeing with both sides of every answered pair (on bfi, 8 of 2,800 respondents)
    score_maximum = 1.0
    parameter_constraints = {
        "share_cutoff": Interval(float, 0, 1, closed="right"),
        "min_pairs": Interval(int, 1, None),
    }

    def __init__(self, *, share_cutoff: float = 0.6, min_pairs: int = 3):
        self.share_cutoff = share_cutoff
        self.min_pairs = min_pairs

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        pairs = instrument.pairs
        n = matrix.n_respondents
        states, reasons = new_states(n)
        answered = np.zeros(n, dtype=np.int64)
        agreed = np.zeros(n, dtype=np.int64)
        disagreed = np.zeros(n, dtype=np.int64)
        deviation_sum = np.zeros(n)
        if len(pairs) == 0:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                "the instrument has no opposite pairs",
            )
        elif len(pairs) < self.min_pairs:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"fewer than {self.min_pairs} opposite pairs in the instrument",
            )
        else:
            answered, agreed, disagreed, deviation_sum = _pair_counts(instrument, matrix, pairs)
            mark(
                states, reasons, answered < self.min_pairs, State.NOT_ASSESSED,
                f"fewer than {self.min_pairs} answered opposite pairs",
            )
        some = answered > 0
        share_agreed = np.divide(agreed, answered, out=np.full(n, np.nan), where=some)
        share_disagreed = np.divide(disagreed, answered, out=np.full(n, np.nan), where=some)
        net = np.divide(deviation_sum, 2 * answered, out=np.full(n, np.nan), where=some)
        return self._result(
            instrument,
            scores=share_agreed,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "pairs_answered": answered,
                "pairs_agreed": agreed,
                "pairs_disagreed": disagreed,
                "acquiescence": share_agreed,
                "disacquiescence": share_disagreed,
                "net_acquiescence": net,
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        net = evidence["net_acquiescence"]
        side = "above" if net >= 0 else "below"
        return (
            f"agreed with both statements of {evidence['pairs_agreed']} of "
            f"{evidence['pairs_answered']} answered opposite pairs "
            f"({evidence['acquiescence']:.2f}; flagged from {evidence['share_cutoff']:.2f}), "
            f"disagreed with both in {evidence['pairs_disagreed']}; "
            f"mean answer {abs(net):.2f} points {side} the midpoint"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        net = evidence["net_acquiescence"]
        return concat(
            "agreed with both statements of ", plain(evidence["pairs_agreed"]), " of ",
            plain(evidence["pairs_answered"]), " answered opposite pairs (",
            fixed(evidence["acquiescence"], 2), "; flagged from ",
            fixed(evidence["share_cutoff"], 2), "), disagreed with both in ",
            plain(evidence["pairs_disagreed"]), "; mean answer ", fixed(np.abs(net), 2),
            " points ", choose(net >= 0, "above", "below"), " the midpoint",
        )


def _pair_groups(instrument: Instrument, pairs: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """The opposite pairs split into complete groups, as (positively keyed, reverse-keyed)
    column indices.

    A group pairs each of its positively keyed items once with each of its reverse-keyed items
    (derived pairs make one group per scale; given pairs are usually groups of one pair), so a
    sum over the group's pairs of a_i * b_j is (sum of a over one side) * (sum of b over the
    other): counting all pairs costs a few sums per item instead of one product per pair.
    Connected items that do not form such a group are split into groups of one pair.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    columns, local = np.unique(pairs, return_inverse=True)
    local = local.reshape(pairs.shape)
    u = len(columns)
    positive = instrument.keyed[columns] == 1
    first_positive = positive[local[:, 0]]
    left = np.where(first_positive, local[:, 0], local[:, 1])  # the positively keyed item
    right = np.where(first_positive, local[:, 1], local[:, 0])
    graph = coo_matrix((np.ones(len(pairs)), (left, right)), shape=(u, u))
    count, label = connected_components(graph, directed=False)
    groups: list[tuple[np.ndarray, np.ndarray]] = []
    for group in range(count):
        members = np.flatnonzero(label == group)
        in_group = label[left] == group
        plus, minus = members[positive[members]], members[~positive[members]]
        distinct = len(set(zip(left[in_group].tolist(), right[in_group].tolist(), strict=True)))
        if in_group.sum() == distinct == len(plus) * len(minus):
            groups.append((columns[plus], columns[minus]))
        else:
            groups.extend(
                (columns[[a]], columns[[b]])
                for a, b in zip(left[in_group], right[in_group], strict=True)
            )
    return groups


def _pair_counts(
    instrument: Instrument, matrix: ResponseMatrix, pairs: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per respondent: answered pairs, pairs agreed on both sides, pairs disagreed on both
    sides, and the sum over answered pairs of both answers' deviations from the midpoint.

    Per item four values (answered, agree side, disagree side, deviation from the midpoint) are
    summed over each side of each group of :func:`_pair_groups`; the pair counts are products
    of the two sides' sums. All values are small integers or halves, so float32 is exact.
    """
    sides = [side for group in _pair_groups(instrument, pairs) for side in group]
    order = np.concatenate(sides)  # each side's items next to each other: left, right, ...
    sizes = np.array([len(side) for side in sides])
    ends = np.cumsum(sizes)
    bounds = list(zip((ends - sizes).tolist(), ends.tolist(), strict=True))
    one_item_sides = len(order) == len(sides)
    midpoint = instrument.midpoint[order].astype(np.float32)[:, None]
    agree_from = np.floor(midpoint).astype(np.int8) + 1  # x > midpoint, for whole x
    disagree_to = np.ceil(midpoint).astype(np.int8) - 1  # x < midpoint
    n = matrix.n_respondents
    answered = np.zeros(n, dtype=np.int64)
    agreed = np.zeros(n, dtype=np.int64)
    disagreed = np.zeros(n, dtype=np.int64)
    deviation_sum = np.zeros(n)
    for rows in row_slices(n, 1 << 13):
        by_item = matrix.answers[rows][:, order].T  # (items, respondents), C-contiguous
        values = np.empty((4, *by_item.shape), dtype=np.float32)
        present = by_item != MISSING
        values[0] = present
        values[1] = by_item >= agree_from  # MISSING lies below every valid code
        np.logical_and(present, by_item <= disagree_to, out=values[2], casting="unsafe")
        np.subtract(by_item, midpoint, out=values[3])
        values[3] *= values[0]
        if one_item_sides:
            sums = values
        else:
            sums = np.empty((4, len(sides), by_item.shape[1]), dtype=np.float32)
            for k, (first, stop) in enumerate(bounds):
                np.sum(values[:, first:stop], axis=1, out=sums[:, k])
        left, right = sums[:, 0::2], sums[:, 1::2]  # (4, groups, respondents)
        answered[rows] = np.einsum("gr,gr->r", left[0], right[0])
        agreed[rows] = np.einsum("gr,gr->r", left[1], right[1])
        disagreed[rows] = np.einsum("gr,gr->r", left[2], right[2])
        deviation_sum[rows] = np.einsum("gr,gr->r", left[3], right[0]) + np.einsum(
            "gr,gr->r", right[3], left[0]
        )
    return answered, agreed, disagreed, deviation_sum
