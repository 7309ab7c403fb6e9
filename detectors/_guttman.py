"""Polytomous Guttman errors: item steps ordered by popularity, and the most errors possible.

Shared by ``person_fit`` (per scale, as evidence) and ``guttman_errors`` (over all items). Item
step (i, k) is the binary item "keyed category of item i >= k", k = 1..m; a Guttman error is a
pair of steps a more popular than b with b passed and a failed (Molenaar 1991; Emons 2008).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "step_positions",
    "cumulative_positions",
    "most_guttman_errors",
    "most_guttman_errors_by_score",
]

#: Stands for "no such item" in the Guttman-error maximum: far below any sum of positions.
_ABSENT = -1e12


def step_positions(popularity: np.ndarray) -> np.ndarray:
    """Place of every item step (i, k) when steps are sorted from most to least popular.

    Ties keep the (item, step) order, so an item's steps stay in their natural order.
    """
    order = np.argsort(-popularity.ravel(), kind="stable")
    positions = np.empty(order.size, dtype=np.int64)
    positions[order] = np.arange(order.size)
    return positions.reshape(popularity.shape)


def cumulative_positions(positions: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """C[g, i, x] = Σ_{k<=x} (place of step (i, k) among the steps of g's answered items).

    A respondent's Guttman errors are then Σ_i C[i, x_i] - S(S-1)/2 with S = Σ x_i: summed
    over passed steps, a step's place counts the steps before it, passed or failed, and the
    passed pairs among them number S(S-1)/2.
    """
    n_items, m = positions.shape
    flat = positions.ravel()
    order = np.empty_like(flat)
    order[flat] = np.arange(flat.size)
    step_item = order // m  # item of each step, in popularity order
    answered_steps = masks[:, step_item]
    before = np.cumsum(answered_steps, axis=1, dtype=np.int32) - answered_steps
    restricted = before[:, flat].reshape(len(masks), n_items, m)
    out = np.zeros((len(masks), n_items, m + 1))
    for k in range(m):  # a running sum over the few steps of an item, for all items at once
        np.add(out[:, :, k], restricted[:, :, k], out=out[:, :, k + 1])
    return out


def most_guttman_errors_by_score(cumulative: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Largest Guttman-error count possible for every total score S = 0..items x m on each
    group's answered items: (groups, items x m + 1), NaN where S exceeds what they allow.

    Maximises Σ_i C[i, x_i] over answers with Σ x_i = S. Each C[i, .] is convex (its
    increments, the places of the item's steps, increase), so an optimum has at most one item
    strictly between 0 and m: q = S // m items at m, one at r = S % m, the rest at 0. Given the
    partial item p, the q full items are those with the largest C[i, m] other than p. With
    the items ranked by C[i, m], a partial item ranked q or lower leaves the top q full; one
    ranked above q leaves the top q + 1 but itself: a running maximum from each end gives the
    best p for every (q, r) at once.
    """
    n_groups, n_items, width = cumulative.shape
    m = width - 1
    full = np.where(masks, cumulative[:, :, m], _ABSENT)
    descending = np.argsort(-full, axis=1, kind="stable")
    # Each group's items in that order, as one gather of whole rows of C.
    flat = descending + (np.arange(n_groups) * n_items)[:, None]
    ranked_cumulative = cumulative.reshape(-1, width)[flat]
    answered = masks.ravel()[flat]
    ranked_full = np.where(answered, ranked_cumulative[:, :, m], _ABSENT)
    top = np.zeros((n_groups, n_items + 1))
    np.cumsum(ranked_full, axis=1, out=top[:, 1:])
    most = np.empty((n_groups, n_items * m + 1))
    most[:, ::m] = top
    if m > 1:
        ranked = np.where(answered[:, :, None], ranked_cumulative[:, :, 1:m], _ABSENT)
        after = np.maximum.accumulate(ranked[:, ::-1], axis=1)[:, ::-1] + top[:, :n_items, None]
        before = np.full_like(after, _ABSENT)
        before[:, 1:] = (
            np.maximum.accumulate(ranked - ranked_full[:, :, None], axis=1)[:, :-1]
            + top[:, 2:, None]
        )
        most[:, :-1].reshape(n_groups, n_items, m)[:, :, 1:] = np.maximum(after, before)
    scores = np.arange(n_items * m + 1)
    most -= scores * (scores - 1) / 2
    most[scores[None, :] > m * masks.sum(axis=1)[:, None]] = np.nan
    return most


def most_guttman_errors(
    cumulative: np.ndarray, masks: np.ndarray, scores: np.ndarray
) -> np.ndarray:
    """Largest Guttman-error count possible for each group's own total score ``scores``."""
    by_score = most_guttman_errors_by_score(cumulative, masks)
    return np.take_along_axis(by_score, np.asarray(scores)[:, None], axis=1)[:, 0]
