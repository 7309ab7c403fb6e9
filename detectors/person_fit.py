"""Person fit under the rating scale model: outfit and infit mean-squares, Guttman errors."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from ._base import Detector, DetectorResult, Interval, Options, State, mark, new_states, row_slices
from ._guttman import cumulative_positions, most_guttman_errors, step_positions
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["PersonFit", "category_probabilities", "reference_notes"]

#: Largest lookup table built per scale, in entries (three tables of float64: 24 MB per scale
#: at most). Patterns of missing answers beyond it are computed row by row (same formulas, more
#: arithmetic); it is reached only by long scales with many different patterns of missing
#: answers.
_TABLE_ENTRIES = 1 << 20
#: Score groups whose person estimates are iterated at once (bounds the (groups, items,
#: categories) temporaries to a few MB).
_GROUPS_PER_BLOCK = 1 << 13
#: Largest Newton step, in logits: a full step far from the solution can overshoot, and no
#: sensible estimate moves further than this in one sweep (common practice, no source).
_MAX_STEP = 1.0
#: Evidence "misfit" by code: not assessed, within the range, underfit, overfit.
_MISFIT = np.array([None, "none", "underfit", "overfit"], dtype=object)


# The model ---------------------------------------------------------------------------------------


def category_probabilities(
    eta: np.ndarray, thresholds: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Probabilities, expected answer and variance under the rating scale model.

    ``P(X = k) ∝ exp(Σ_{j<=k} (θ - δ_i - τ_j))`` for k = 0..m with the empty sum for k = 0,
    given ``eta = θ - δ_i`` (any shape) and the m thresholds τ_1..τ_m. Returns
    ``P`` (shape ``eta.shape + (m + 1,)``), ``E = Σ k P_k`` and ``W = Σ (k - E)² P_k``.
    """
    kappa = np.concatenate([[0.0], -np.cumsum(thresholds)])
    k = np.arange(len(kappa), dtype=np.float64)
    logits = eta[..., None] * k + kappa
    logits -= logits.max(axis=-1, keepdims=True)
    probabilities = np.exp(logits)
    probabilities /= probabilities.sum(axis=-1, keepdims=True)
    expected = probabilities @ k
    variance = probabilities @ (k * k) - expected * expected
    # Rounding can leave a hair below zero far from the thresholds; W is a divisor.
    return probabilities, expected, np.maximum(variance, 1e-300)


@dataclass(frozen=True)
class _Layout:
    """One scale's items and how their answers become categories 0..m in the keyed direction."""

    name: str
    columns: np.ndarray  # instrument columns, in the scale's order
    sign: np.ndarray  # +1, or -1 for reverse-keyed items (int16)
    offset: np.ndarray  # -lowest, or highest for reverse-keyed items (int16)
    m: int  # highest category (points - 1)

    @property
    def n_items(self) -> int:
        return len(self.columns)

    def categories(self, block: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Categories (int16; m + 1 where unanswered) and the answered mask of a row block.

        Keyed answers x' = lowest + highest - x for reverse-keyed items, then x' - lowest.
        """
        raw = block[:, self.columns]
        answered = raw != MISSING
        category = raw.astype(np.int16) * self.sign + self.offset
        return np.where(answered, category, np.int16(self.m + 1)), answered


@dataclass(frozen=True)
class _Model:
    """A fitted scale: item difficulties, thresholds and the popularity order of item steps."""

    layout: _Layout
    difficulties: np.ndarray  # δ_i
    thresholds: np.ndarray  # τ_1..τ_m
    positions: np.ndarray  # (items, m): place of step "x_i >= k" from most to least popular


def _layouts(instrument: Instrument, min_items: int) -> list[tuple[_Layout | None, str, str]]:
    """Every scale of at least ``min_items`` items: (layout or None, name, why not usable)."""
    out = []
    for name, columns in instrument.scales.items():
        if len(columns) < min_items:
            continue
        points = instrument.points[columns]
        if len(set(points.tolist())) > 1:
            out.append((
                None, name,
                "its items have different numbers of answer options "
                f"({', '.join(str(p) for p in sorted(set(points.tolist())))}); the rating scale "
                "model needs one",
            ))
            continue
        reverse = instrument.keyed[columns] == -1
        lowest = instrument.lowest[columns].astype(np.int16)
        highest = instrument.highest[columns].astype(np.int16)
        layout = _Layout(
            name=name,
            columns=columns,
            sign=np.where(reverse, -1, 1).astype(np.int16),
            offset=np.where(reverse, highest, -lowest).astype(np.int16),
            m=int(points[0]) - 1,
        )
        out.append((layout, name, ""))
    return out


def _pattern_groups(answered: np.ndarray, score: np.ndarray) -> tuple[np.ndarray, ...]:
    """Group rows by (which items were answered, raw score): the person estimate depends on
    nothing else. Returns (inverse, group masks, group scores, counts), groups in key order.

    The key is the score's bytes then the answered mask as bits; up to 8 bytes (scales of up
    to 48 items) it is sorted as one integer, otherwise as bytes.
    """
    score_bytes = 2 if len(score) == 0 or score.max() < 1 << 16 else 4
    packed = np.packbits(answered, axis=1, bitorder="little")
    width = score_bytes + packed.shape[1]
    padded = max(8, width)
    key = np.zeros((len(score), padded), dtype=np.uint8)
    key[:, :score_bytes] = (
        score.astype(f"<u{score_bytes}").view(np.uint8).reshape(-1, score_bytes)
    )
    key[:, score_bytes:width] = packed
    as_one = key.view("<u8") if padded == 8 else key.view(np.dtype((np.void, padded)))
    unique, inverse, counts = np.unique(as_one[:, 0], return_inverse=True, return_counts=True)
    decoded = np.ascontiguousarray(unique).view(np.uint8).reshape(len(unique), padded)
    scores = decoded[:, :score_bytes].copy().view(f"<u{score_bytes}")[:, 0].astype(np.int64)
    masks = np.unpackbits(
        decoded[:, score_bytes:width], axis=1, count=answered.shape[1], bitorder="little"
    ).astype(bool)
    return inverse.reshape(-1), masks, scores, counts


def _person_estimates(
    difficulties: np.ndarray,
    thresholds: np.ndarray,
    masks: np.ndarray,
    scores: np.ndarray,
    tolerance: float,
    max_iterations: int,
) -> np.ndarray:
    """Maximum-likelihood θ per score group given the item parameters; NaN for a group with
    no answered item or an extreme score (no finite estimate)."""
    m = len(thresholds)
    answered = masks.sum(axis=1)
    theta = np.full(len(scores), np.nan)
    finite = (answered > 0) & (scores > 0) & (scores < answered * m)
    for start in range(0, len(scores), _GROUPS_PER_BLOCK):
        block = slice(start, start + _GROUPS_PER_BLOCK)
        rows = np.flatnonzero(finite[block]) + start
        if len(rows) == 0:
            continue
        mask, score, count = masks[rows], scores[rows], answered[rows]
        # Start from the log-odds of the score plus the mean difficulty of the answered items.
        mean_difficulty = (mask @ difficulties) / count
        value = mean_difficulty + np.log((score + 0.5) / (count * m - score + 0.5))
        for _ in range(max_iterations):
            _, expected, variance = category_probabilities(value[:, None] - difficulties, thresholds)
            residual = score - np.where(mask, expected, 0.0).sum(axis=1)
            information = np.where(mask, variance, 0.0).sum(axis=1)
            step = np.clip(residual / information, -_MAX_STEP, _MAX_STEP)
            value += step
            if np.abs(step).max() < tolerance:
                break
        theta[rows] = value
    return theta


# Screening ---------------------------------------------------------------------------------------

#: Columns of the per-group table: Σ W over the counted items, items counted in the fit (0 when
#: the score is extreme), extreme score (1/0), -S(S-1)/2, most Guttman errors for S.
_VARIANCE, _USED, _EXTREME, _OFFSET, _MOST = range(5)


@dataclass(frozen=True)
class _Tables:
    """Per score group g, flat cell tables indexed ((g * items + i) * (m + 2) + x), where
    x = m + 1 stands for an unanswered item (all 0), and the per-group values (groups, 5)."""

    squared_z: np.ndarray  # (x - E)² / W
    squared_residual: np.ndarray  # (x - E)²
    guttman: np.ndarray  # C[i, x]
    per_group: np.ndarray


def _tables(model: _Model, theta: np.ndarray, masks: np.ndarray, scores: np.ndarray) -> _Tables:
    m = model.layout.m
    answered = masks.sum(axis=1)
    estimated = ~np.isnan(theta)
    _, expected, variance = category_probabilities(
        np.where(estimated, theta, 0.0)[:, None] - model.difficulties, model.thresholds
    )
    counted = masks & estimated[:, None]
    shape = (len(theta), model.layout.n_items, m + 2)
    squared_residual = np.zeros(shape)
    squared_residual[:, :, : m + 1] = (np.arange(m + 1) - expected[..., None]) ** 2
    squared_residual[~counted] = 0.0
    squared_z = squared_residual / variance[..., None]
    cumulative = cumulative_positions(model.positions, masks)
    guttman = np.zeros(shape)
    guttman[:, :, : m + 1] = cumulative
    guttman[~masks] = 0.0
    per_group = np.empty((len(theta), 5))
    per_group[:, _VARIANCE] = np.where(counted, variance, 0.0).sum(axis=1)
    per_group[:, _USED] = counted.sum(axis=1)
    per_group[:, _EXTREME] = (answered > 0) & ~estimated
    per_group[:, _OFFSET] = -(scores * (scores - 1) / 2.0)
    per_group[:, _MOST] = most_guttman_errors(cumulative, masks, scores)
    return _Tables(squared_z.ravel(), squared_residual.ravel(), guttman.ravel(), per_group)


@dataclass(frozen=True)
class _Plan:
    """The modelled scales laid over one block of columns: the instrument's columns from the
    first to the last modelled item (a view of the answers, no copy). Columns of the block on
    no modelled scale (attention checks, items without a scale) always read category 0 and
    point at the block of zeros of pass 2, so they add nothing."""

    models: list[_Model]
    first: int  # first instrument column of the block
    columns: np.ndarray  # instrument column of each block column
    sign: np.ndarray
    offset: np.ndarray
    unanswered: np.ndarray  # category code of an unanswered item: m + 1 of its scale
    scale_of: np.ndarray  # scale number of each block column (number of scales: none)
    cell: np.ndarray  # i * (m + 2): where an item's cells start in its group's table block
    indicator: np.ndarray  # (block columns, scales) 0/1: sums per scale as one product
    positions: list[np.ndarray]  # block columns of each scale, in the scale's order

    @classmethod
    def of(cls, models: list[_Model]) -> _Plan:
        layouts = [model.layout for model in models]
        first = int(min(layout.columns.min() for layout in layouts))
        width = int(max(layout.columns.max() for layout in layouts)) - first + 1
        plan = cls(
            models=models,
            first=first,
            columns=np.arange(first, first + width),
            sign=np.zeros(width, dtype=np.int16),
            offset=np.zeros(width, dtype=np.int16),
            unanswered=np.zeros(width, dtype=np.int16),
            scale_of=np.full(width, len(layouts)),
            cell=np.zeros(width, dtype=np.int64),
            indicator=np.zeros((width, len(layouts))),
            positions=[layout.columns - first for layout in layouts],
        )
        for s, (layout, where) in enumerate(zip(layouts, plan.positions, strict=True)):
            plan.sign[where] = layout.sign
            plan.offset[where] = layout.offset
            plan.unanswered[where] = layout.m + 1
            plan.scale_of[where] = s
            plan.cell[where] = np.arange(layout.n_items) * (layout.m + 2)
            plan.indicator[where, s] = 1.0
        return plan

    def categories(self, answers: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Keyed categories of the block (m + 1 where unanswered) and the answered mask."""
        raw = answers[:, self.first : self.first + len(self.columns)]
        answered = raw != MISSING
        category = raw.astype(np.int16) * self.sign + self.offset
        return np.where(answered, category, self.unanswered), answered


@dataclass(frozen=True)
class _ScaleGroups:
    """A scale's score groups: 0..top are the respondents who answered every item (group =
    score), then each pattern of (answered items, score) of the others; the first ``tabled``
    groups have lookup tables, the rest are computed row by row."""

    theta: np.ndarray
    masks: np.ndarray
    scores: np.ndarray
    tabled: int
    tables: _Tables


@dataclass
class _Totals:
    """Per-respondent sums over the modelled scales."""

    squared_z: np.ndarray
    squared_residual: np.ndarray
    variance: np.ndarray
    used: np.ndarray
    answered: np.ndarray
    extreme_scales: np.ndarray
    extreme_items: np.ndarray
    guttman: np.ndarray
    guttman_max: np.ndarray

    @classmethod
    def empty(cls, n: int) -> _Totals:
        return cls(*(np.zeros(n) for _ in range(9)))

    def add(self, rows: slice | np.ndarray, cells: tuple[np.ndarray, ...], per_group: np.ndarray,
            count: np.ndarray) -> None:
        """Add cell sums (rows,) x 3, per-group values (rows, scales, 5) and answered counts
        (rows, scales)."""
        squared_z, squared_residual, guttman = cells
        summed = per_group.sum(axis=1)
        self.squared_z[rows] += squared_z
        self.squared_residual[rows] += squared_residual
        self.guttman[rows] += guttman + summed[:, _OFFSET]
        self.guttman_max[rows] += summed[:, _MOST]
        self.variance[rows] += summed[:, _VARIANCE]
        self.used[rows] += summed[:, _USED]
        self.answered[rows] += count.sum(axis=1)
        self.extreme_scales[rows] += summed[:, _EXTREME]
        self.extreme_items[rows] += (per_group[:, :, _EXTREME] * count).sum(axis=1)


def _score_groups(
    plan: _Plan, matrix: ResponseMatrix, tolerance: float, max_iterations: int
) -> tuple[np.ndarray, np.ndarray, list[_ScaleGroups]]:
    """Pass 1: every respondent's group and number of answered items on every scale (both
    (n, scales)), and each group's θ and tables."""
    n, n_scales = matrix.n_respondents, len(plan.models)
    groups = np.empty((n, n_scales), dtype=np.int64)
    counts = np.empty((n, n_scales), dtype=np.int16)
    partial: list[list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = [[] for _ in plan.models]
    sizes = np.array([model.layout.n_items for model in plan.models])
    with threadpool_limits(limits=1, user_api="blas"):  # small products, as in pass 2
        for rows in row_slices(n):
            category, answered = plan.categories(matrix.answers[rows])
            # Sums per scale as one product; small integers, so exact in float64.
            score = np.where(answered, category, 0).astype(np.float64) @ plan.indicator
            count = answered.astype(np.float64) @ plan.indicator
            groups[rows] = score
            counts[rows] = count
            for s in np.flatnonzero((count < sizes).any(axis=0)).tolist():
                missed = np.flatnonzero(count[:, s] < sizes[s])
                partial[s].append((
                    missed + rows.start,
                    answered[missed][:, plan.positions[s]],
                    score[missed, s],
                ))
    out = []
    for s, model in enumerate(plan.models):
        n_items, m = model.layout.n_items, model.layout.m
        top = n_items * m
        masks, scores = np.ones((top + 1, n_items), dtype=bool), np.arange(top + 1)
        if partial[s]:
            inverse, pattern_masks, pattern_scores, _ = _pattern_groups(
                np.concatenate([a for _, a, _ in partial[s]]),
                np.concatenate([c for _, _, c in partial[s]]).astype(np.int64),
            )
            groups[np.concatenate([r for r, _, _ in partial[s]]), s] = top + 1 + inverse
            masks = np.concatenate([masks, pattern_masks])
            scores = np.concatenate([scores, pattern_scores])
        theta = _person_estimates(
            model.difficulties, model.thresholds, masks, scores, tolerance, max_iterations
        )
        tabled = len(theta) if len(theta) * n_items * (m + 2) <= _TABLE_ENTRIES else top + 1
        tables = _tables(model, theta[:tabled], masks[:tabled], scores[:tabled])
        out.append(_ScaleGroups(theta, masks, scores, tabled, tables))
    return groups, counts, out


def _own_cells(
    plan: _Plan, scale: int, groups: _ScaleGroups, g: np.ndarray, category: np.ndarray,
    answered: np.ndarray,
) -> tuple[_Tables, np.ndarray]:
    """Tables of the given rows, each its own group, and the index of each row's cells."""
    model = plan.models[scale]
    where = plan.positions[scale]
    tables = _tables(model, groups.theta[g], answered[:, where], groups.scores[g])
    size = model.layout.n_items * (model.layout.m + 2)
    index = (np.arange(len(g)) * size)[:, None] + plan.cell[where] + category[:, where]
    return tables, index


def _accumulate(
    plan: _Plan, matrix: ResponseMatrix, tolerance: float, max_iterations: int
) -> tuple[_Totals, np.ndarray, list[_ScaleGroups]]:
    """Every respondent's sums over the modelled scales.

    Pass 1 finds each respondent's score group on each scale and gives every group its θ and
    lookup tables; pass 2 reads each respondent's cells from the tables of all scales at once
    (tables laid end to end, after a block of zeros that rows computed on their own point to).
    """
    n = matrix.n_respondents
    groups, counts, scales = _score_groups(plan, matrix, tolerance, max_iterations)
    sizes = np.array([m.layout.n_items * (m.layout.m + 2) for m in plan.models])
    tabled = np.array([s.tabled for s in scales])
    zeros = int(sizes.max())
    table_starts = zeros + np.concatenate([[0], np.cumsum(sizes * tabled)[:-1]])
    group_starts = 1 + np.concatenate([[0], np.cumsum(tabled)[:-1]])
    flat = {
        name: np.concatenate([np.zeros(zeros)] + [getattr(s.tables, name) for s in scales])
        for name in ("squared_z", "squared_residual", "guttman")
    }
    per_group = np.concatenate([np.zeros((1, 5))] + [s.tables.per_group for s in scales])
    ones = np.ones(len(plan.columns))
    totals = _Totals.empty(n)
    # One BLAS thread: the products are small and threads would only wait between them.
    with threadpool_limits(limits=1, user_api="blas"):
        for rows in row_slices(n):
            category, answered = plan.categories(matrix.answers[rows])
            g = groups[rows]
            in_table = g < tabled
            base = np.zeros((len(g), len(sizes) + 1), dtype=np.int64)  # last: no scale
            np.copyto(base[:, :-1], g * sizes + table_starts, where=in_table)
            index = np.take(base, plan.scale_of, axis=1)
            index += plan.cell
            index += category
            cells = tuple(flat[name].take(index) @ ones for name in flat)
            values = per_group.take(np.where(in_table, g + group_starts, 0), axis=0)
            count = counts[rows]
            totals.add(rows, cells, values, count * in_table)
            if in_table.all():
                continue
            for s in np.flatnonzero(~in_table.all(axis=0)).tolist():
                own = np.flatnonzero(~in_table[:, s])
                tables, own_index = _own_cells(
                    plan, s, scales[s], g[own, s], category[own], answered[own]
                )
                cells = tuple(
                    getattr(tables, name).take(own_index).sum(axis=1) for name in flat
                )
                totals.add(
                    own + rows.start, cells, tables.per_group[:, None, :], count[own, s : s + 1]
                )
    return totals, groups, scales


def _largest_residuals(
    plan: _Plan, matrix: ResponseMatrix, groups: np.ndarray, scales: list[_ScaleGroups],
    rows: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """For the given respondents, the largest z² and its instrument column (-1 when none)."""
    value = np.zeros(len(rows))
    column = np.full(len(rows), -1, dtype=np.int64)
    for part in row_slices(len(rows)):
        chosen = rows[part]
        category, answered = plan.categories(matrix.answers[chosen])
        cells = np.zeros(category.shape)
        for s in range(len(plan.models)):
            tables, index = _own_cells(plan, s, scales[s], groups[chosen, s], category, answered)
            cells[:, plan.positions[s]] = tables.squared_z.take(index)
        worst = cells.argmax(axis=1)
        value[part] = cells[np.arange(len(chosen)), worst]
        column[part] = np.where(value[part] > 0, plan.columns[worst], -1)
    return value, column


# Estimation ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Estimate:
    difficulties: np.ndarray
    thresholds: np.ndarray
    difficulty_errors: np.ndarray
    threshold_errors: np.ndarray
    iterations: int
    converged: bool
    largest_change: float


def _joint_maximum_likelihood(
    category: np.ndarray, answered: np.ndarray, m: int, tolerance: float, max_iterations: int
) -> _Estimate:
    """Item difficulties and thresholds by joint maximum likelihood (no extreme scores, every
    item and category observed), before the bias correction."""
    values = np.where(answered, category, 0).astype(np.int64)
    score = values.sum(axis=1)
    _, masks, scores, counts = _pattern_groups(answered, score)
    weights = masks * counts[:, None].astype(np.float64)  # respondents per (group, item)
    item_score = values.sum(axis=0).astype(np.float64)
    item_count = answered.sum(axis=0)
    at_least = np.array(
        [((values >= k) & answered).sum() for k in range(1, m + 1)], dtype=np.float64
    )
    in_category = np.array([((values == k) & answered).sum() for k in range(m + 1)], dtype=np.float64)
    # Starting values: log-odds of item means, adjacent-category counts, person scores.
    difficulties = np.log((m * item_count - item_score + 0.5) / (item_score + 0.5))
    difficulties -= difficulties.mean()
    thresholds = np.log((in_category[:-1] + 0.5) / (in_category[1:] + 0.5))
    thresholds -= thresholds.mean()
    answered_count = masks.sum(axis=1)
    theta = (masks @ difficulties) / answered_count + np.log(
        (scores + 0.5) / (answered_count * m - scores + 0.5)
    )
    later = np.maximum.outer(np.arange(m), np.arange(m))
    change, converged, sweeps = math.inf, False, 0
    while sweeps < max_iterations:
        sweeps += 1
        # Persons, then items, then thresholds: each a Newton step given the others.
        _, expected, variance = category_probabilities(theta[:, None] - difficulties, thresholds)
        person_step = np.clip(
            (scores - np.where(masks, expected, 0.0).sum(axis=1))
            / np.where(masks, variance, 0.0).sum(axis=1),
            -_MAX_STEP, _MAX_STEP,
        )
        theta += person_step
        _, expected, variance = category_probabilities(theta[:, None] - difficulties, thresholds)
        item_step = np.clip(
            ((weights * expected).sum(axis=0) - item_score) / (weights * variance).sum(axis=0),
            -_MAX_STEP, _MAX_STEP,
        )
        difficulties += item_step
        gradient, information = _threshold_derivatives(
            theta, difficulties, thresholds, weights, at_least, later
        )
        threshold_step = np.clip(np.linalg.solve(information, gradient), -_MAX_STEP, _MAX_STEP)
        thresholds += threshold_step
        # Identification: Σ τ = 0 and mean δ = 0 per scale, moving the others so that every
        # θ - δ - τ_j stays as it is.
        shift = thresholds.mean()
        thresholds -= shift
        difficulties += shift
        centre = difficulties.mean()
        difficulties -= centre
        theta -= centre
        change = float(max(np.abs(person_step).max(), np.abs(item_step).max(),
                           np.abs(threshold_step).max()))
        if change < tolerance:
            converged = True
            break
    _, _, variance = category_probabilities(theta[:, None] - difficulties, thresholds)
    _, information = _threshold_derivatives(
        theta, difficulties, thresholds, weights, at_least, later
    )
    return _Estimate(
        difficulties=difficulties,
        thresholds=thresholds,
        difficulty_errors=1 / np.sqrt((weights * variance).sum(axis=0)),
        threshold_errors=np.sqrt(np.diag(np.linalg.inv(information))),
        iterations=sweeps,
        converged=converged,
        largest_change=change,
    )


def _threshold_derivatives(
    theta: np.ndarray,
    difficulties: np.ndarray,
    thresholds: np.ndarray,
    weights: np.ndarray,
    at_least: np.ndarray,
    later: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Gradient of the log-likelihood in τ_1..τ_m and its information matrix.

    ∂ℓ/∂τ_j = Σ P(X >= j) - #(x >= j); -∂²ℓ/∂τ_j∂τ_l = Σ Cov(1[X >= j], 1[X >= l])
    = Σ (P(X >= max(j, l)) - P(X >= j) P(X >= l)).
    """
    probabilities, _, _ = category_probabilities(theta[:, None] - difficulties, thresholds)
    tail = np.cumsum(probabilities[..., ::-1], axis=-1)[..., ::-1][..., 1:]  # P(X >= j)
    expected = np.einsum("gi,gij->j", weights, tail)
    information = expected[later] - np.einsum("gi,gij,gil->jl", weights, tail, tail)
    return expected - at_least, information


# The detector ------------------------------------------------------------------------------------


class PersonFit(Detector):
    """Outfit and infit mean-squares of each respondent under the rating scale model.

    The rating scale model (Andrich 1978) gives the probability of category k = 0..m of item i
    for a respondent at trait level θ as::

        P(X = k) ∝ exp(Σ_{j<=k} (θ - δ_i - τ_j)),   τ_0 = 0,   Σ_j τ_j = 0

    with one difficulty δ_i per item and thresholds τ_1..τ_m shared by the scale's items. It is
    fitted **per scale** (``instrument.scales``, scales of at least ``min_scale_items`` items)
    on answers reverse keyed where the item is keyed -1 (x' = lowest + highest - x) and
    recoded to categories 0..m (m = points - 1). Item difficulties and thresholds (the
    *reference*) are estimated by joint maximum likelihood from a reference sample with
    ``fit``, or from the screened matrix itself. Each respondent then gets a θ per scale
    (maximum likelihood given the reference) and, with E = Σ k P_k, W = Σ (k - E)² P_k and
    z = (x - E) / √W for every answered item of every modelled scale (each against its own
    scale's model; items outside the modelled scales are left out), the mean-squares of Wright &
    Masters (1982)::

        outfit = mean of z²           infit = Σ (x - E)² / Σ W

    Both are about 1 for answers the model expects. Above 1 the answers are noisier than the
    model predicts (*underfit*: e.g. random answering, agreeing with a statement and its
    opposite); below 1 they are more predictable than it (*overfit*: a mechanical pattern such
    as one keyed answer throughout). A respondent is flagged when a judged mean-square lies
    above ``upper_mean_square`` (and, with ``flag_overfit``, below ``lower_mean_square``). The
    contract needs one score with flag = score >= cut-off, so the score is the **misfit
    ratio**, how far the judged mean-squares lie beyond a bound as a ratio to it::

        score = max(MS / upper, lower / MS)   over the judged MS

    with cut-off 1 (outfit alone by default, outfit and infit with
    ``mean_squares="outfit_or_infit"``), e.g. outfit 2.1 gives 1.5 and outfit 0.3 gives 2.0;
    within the range the score is below 1. Without ``flag_overfit`` (the default) an
    overfitting respondent's cut-off is infinite: the score still ranks them (answers too
    regular for the model, such as random answers kept to the middle of the scale, are worth
    a look), but only underfit raises the flag.

    The evidence gives outfit, infit, the number of items they cover, whether the respondent
    under- or overfits, for an underfitting respondent the item with the largest z² (the most
    unexpected answer), and the polytomous Guttman errors summed over the scales with their
    normalised value (Molenaar 1991; Emons 2008). The Guttman errors
    are evidence only; they do not change the flag. Each item step "x_i >= k" (k = 1..m) is a
    pass/fail item; steps are ordered from most to least popular in the reference sample (share
    of the respondents answering the item who reach step k). A Guttman error is a pair of steps
    a, b of the respondent's answered items, a more popular than b, with b passed and a
    failed; the count is normalised by the largest count possible for the respondent's raw
    score on the same answered items (computed exactly; see Notes), so 0 is a perfect Guttman
    pattern and 1 the most reversed one.

    Parameters
    ----------
    lower_mean_square : float in [0, 1), default 0.6
    upper_mean_square : float > 1, default 1.4
        The accepted range of the mean-squares: 0.6 to 1.4 is the range Wright & Linacre (1994)
        give as reasonable for rating scale (survey) data. A respondent outside it is
        reported as under- or overfitting in the evidence.
    flag_overfit : bool, default False
        Whether overfit (a mean-square below ``lower_mean_square``) raises the flag, as
        underfit always does. Heedful's default is no: overfit means answers *more*
        predictable than the model, which is not carelessness, and with short scales it is
        mostly an artefact of estimating a person location per scale (the table in Notes: 15%
        of model-conforming respondents below 0.6 on five scales of 5 items; 29% of the bfi
        originals).
    mean_squares : {"outfit", "outfit_or_infit"}, default "outfit"
        Which mean-squares are judged. ``"outfit"``, Heedful's default, follows the usual
        practice of judging person fit by outfit, the statistic most sensitive to a few very
        unexpected answers; ``"outfit_or_infit"`` also flags when infit alone lies outside the
        range (the range is given for both). On the bfi data the second raised the share of
        original respondents flagged from 42% to 48% and of 300 planted uniform random
        answerers from 72% to 74% (Heedful's computation).
    min_scale_items : int >= 2, default 4
        Only scales with at least this many items are modelled; a summed scale wants at least 4
        items (common practice, no source).
    min_answered_items : int >= 2, default 20
        A respondent is assessed only with at least this many answered items on modelled scales
        (not counting scales with an extreme score, see Notes). Heedful's choice: the spread of
        a mean-square shrinks with the number of items L (roughly √(2/L); from memory) while the
        accepted range does not, and in Heedful's simulations under the model a third of the
        respondents lie outside 0.6-1.4 by chance at 10 items and a sixth at 20 (see Notes).
    min_respondents : int >= 10, default 100
        A scale is modelled only when the reference sample holds at least this many respondents
        without an extreme score on it. About 100 respondents estimate Rasch item difficulties
        to within about half a logit (Linacre 1994, from memory, not checked).
    max_fit_respondents : int >= 100, default 5000
        The estimation uses at most this many respondents of the reference sample, chosen at
        random (seeded by ``seed``), so a reference from a million respondents is estimated in
        about a second. Heedful's choice: with 5,000 respondents the standard errors of the item
        difficulties are a few hundredths of a logit (the reference lists them).
    seed : int >= 0, default 0
        Seed of that random selection.
    tolerance : float > 0, default 1e-5
        Estimation stops when no parameter (person, item or threshold) moves by more than this
        many logits in a sweep; the person estimates of screening use the same tolerance.
        Heedful's choice: far below the standard errors, and reached in about 30 sweeps.
    max_iterations : int >= 1, default 500
        Most sweeps of the estimation (and Newton steps per person estimate). A reference that
        stops here says so in its ``notes``.

    Notes
    -----
    **Estimation.** Joint maximum likelihood (JML) alternates Newton steps for the persons,
    the items and the thresholds (the thresholds jointly, with their m x m information matrix),
    vectorised over respondents with masks for unanswered items; each step is clipped at 1 logit.
    After each sweep Σ τ = 0 and the mean δ of the scale = 0 are restored by shifts that leave
    every θ - δ_i - τ_j unchanged. The person estimate depends only on which items were
    answered and the raw score, so respondents are grouped by that pattern first: this makes
    the estimation and the screening of a million respondents take seconds.

    **Extreme scores.** A respondent whose answers on a scale are all in the lowest or all in
    the highest category (after keying) has no finite estimate on it. Such respondents are left
    out of the estimation, and in screening such a scale is left out of the respondent's fit
    statistics: its answers are exactly what an extreme θ predicts and carry no information on
    fit (they count as 0 Guttman errors). The evidence counts these scales. A respondent with
    an extreme score on every scale is not assessed here; one answer throughout is the business
    of ``straightlining`` and ``long_string``.

    **JML bias.** JML item estimates are too spread out when each person answers few items.
    The usual correction multiplies them by (L - 1)/L, L = the number of items of the scale
    (Wright & Douglas 1977, from memory, not checked); Heedful applies it to the difficulties,
    the thresholds and their standard errors. In Heedful's simulations (5,000 respondents, 5
    categories) it takes the root mean square error of the difficulties from about 0.19 to
    0.02 logits on 5 items and from about 0.08 to 0.02 on 10. The standard errors are the model's asymptotic
    ones (inverse information at the estimates, persons taken as known).

    **The reference.** ``fit`` returns a JSON-ready dict: for each modelled scale its items,
    keying, number of options, difficulties, thresholds, standard errors, step popularities,
    respondents used and convergence; scales that could not be modelled with the reason; and
    ``notes``, readable sentences about the instrument (see :func:`reference_notes`). Thresholds
    that do not increase (*disordered*: some category is at no trait level the most likely
    answer) are reported there; the model is still used. A scale is not modelled when its items
    have different numbers of options, when the sample has too few respondents without an
    extreme score, or when an item has only extreme answers or an option is never used on the
    scale (the estimates then run to infinity). With more than ``max_fit_respondents``
    respondents the random selection makes ``screen`` without a reference depend on the order
    of the rows; fit once and screen against the stored reference to avoid it.

    **Guttman errors.** With C[i, x] the summed places (among the respondent's answered steps,
    most popular first, counting from 0) of item i's steps 1..x, the count is
    Σ_i C[i, x_i] - S(S - 1)/2 with S = Σ x_i. Its maximum given S is the largest
    Σ_i C[i, x_i] with Σ x_i = S, steps of an item passed in order. Each C[i, .] is convex, so
    an optimum fills S // m items to the top and one item to S % m: the maximum is exact, found
    by trying each item as the partly filled one with the others chosen by their full value.

    **When it stops being valid.** The mean-squares are only as good as the model: a scale
    that measures more than one trait, or items that depend on one another, make attentive
    respondents misfit. Response styles also show as misfit (extreme answering as overfit or
    underfit, depending on the items). The accepted range is fixed while the sampling spread
    of the mean-squares shrinks with the number of items, and each scale's θ is estimated from
    the very answers it judges, which pulls the mean-squares below 1 on short scales. Share of
    respondents *simulated under the model* whose outfit lies outside 0.6-1.4 (Heedful's
    simulations: 4,000 respondents, θ ~ N(0, 1.5²), 5 options, difficulties -1 to 1):

    =========================  ======  ==========  ============
    items                      mean    above 1.4   below 0.6
    =========================  ======  ==========  ============
    10 (one scale)             0.93    12%         21%
    20 (one scale)             0.97    8%          9%
    25 (five scales of 5)      0.86    3%          15%
    50 (five scales of 10)     0.93    1%          2%
    100 (ten scales of 10)     0.93    0.2%        0.3%
    =========================  ======  ==========  ============

    On the bfi data (five scales of 5 six-point items) 13% of the original respondents lie
    above 1.4 and 29% below 0.6, against 72% of 300 planted uniform random answerers flagged;
    with overfit not flagged (the default) 13% of the originals are flagged and still 72% of
    the random answerers (Heedful's computation). So with fewer than about 50 items the flag
    says more about the test's length than about the respondent: rank by the score, read the
    evidence, set ``flag_overfit`` only where overfit is of interest, and look at the sample's
    distribution before relying on the flag. Flags are evidence for a human decision, not a
    verdict about the respondent.

    Not applicable: no scale with at least ``min_scale_items`` items. Not assessed: no scale
    could be modelled (the reference gives the reasons), the reference was estimated for other
    scales, or fewer than ``min_answered_items`` items count for the respondent.

    References
    ----------
    Andrich, D. (1978). A rating formulation for ordered response categories. Psychometrika,
    43(4), 561-573.

    Wright, B. D., & Masters, G. N. (1982). Rating Scale Analysis. Chicago: MESA Press.

    Wright, B. D., & Linacre, J. M. (1994). Reasonable mean-square fit values. Rasch
    Measurement Transactions, 8(3), 370.

    Wright, B. D., & Douglas, G. A. (1977). Best procedures for sample-free item analysis.
    Applied Psychological Measurement, 1(2), 281-295. (From memory, not checked.)

    Molenaar, I. W. (1991). A weighted Loevinger H-coefficient extending Mokken scaling to
    multicategory items. Kwantitatieve Methoden, 12(37), 97-117. (From memory, not checked.)

    Emons, W. H. M. (2008). Nonparametric person-fit analysis of polytomous item scores.
    Applied Psychological Measurement, 32(3), 224-247.

    Linacre, J. M. (1994). Sample size and item calibration stability. Rasch Measurement
    Transactions, 7(4), 328. (From memory, not checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"{s}{i}", "scale": s} for s in "abc" for i in range(1, 9)]})
    >>> rng = np.random.default_rng(0)
    >>> eta = rng.normal(size=(500, 1)) - np.tile(np.linspace(-1, 1, 8), 3)
    >>> p, _, _ = category_probabilities(eta, np.array([-1.5, -0.5, 0.5, 1.5]))
    >>> answers = 1 + (p.cumsum(axis=-1) < rng.random((500, 24, 1))).sum(axis=-1)
    >>> answers[0] = rng.integers(1, 6, 24)  # no pattern
    >>> answers[1] = np.tile([4, 4, 4, 4, 3, 3, 3, 3], 3)  # too regular
    >>> result = PersonFit().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> result.evidence["misfit"][:2].tolist(), round(float(result.flags[2:].mean()), 2)
    (['underfit', 'overfit'], 0.04)
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answers less predictable than the rating scale model expects: outfit 2.67, infit 2.64 on
    24 items (flagged when outfit lies above 1.4); most unexpected answer b1
    (squared standardised residual 12.8); 184 Guttman errors (41% of the most possible for
    these scores)
    >>> print(result.sentence_for(1))  # doctest: +NORMALIZE_WHITESPACE
    answers more predictable than the rating scale model expects: outfit 0.09, infit 0.09 on
    24 items (flagged when outfit lies above 1.4); 0 Guttman errors (0% of the most
    possible for these scores)

    The last figure is the chance rate of a 24-item questionnaire (see Notes).
    """

    name = "person_fit"
    family = "misfit"
    needs_sample = True
    summary = "Outfit and infit mean-squares under the rating scale model, per scale."
    reference = (
        "Wright, B. D., & Masters, G. N. (1982). Rating Scale Analysis. Chicago: MESA Press."
    )
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "upper_mean_square"
    parameter_constraints = {
        "lower_mean_square": Interval(float, 0, 1, closed="left"),
        "flag_overfit": Options((False, True)),
        "upper_mean_square": Interval(float, 1, None, closed="neither"),
        "mean_squares": Options(("outfit_or_infit", "outfit")),
        "min_scale_items": Interval(int, 2, None),
        "min_answered_items": Interval(int, 2, None),
        "min_respondents": Interval(int, 10, None),
        "max_fit_respondents": Interval(int, 100, None),
        "seed": Interval(int, 0, 2**32 - 1),
        "tolerance": Interval(float, 0, None, closed="neither"),
        "max_iterations": Interval(int, 1, None),
    }

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        # the score is the misfit ratio MS / upper: a ratio cut-off c means MS >= c x upper
        return cutoffs * float(params["upper_mean_square"])

    def __init__(
        self,
        *,
        lower_mean_square: float = 0.6,
        flag_overfit: bool = False,
        upper_mean_square: float = 1.4,
        mean_squares: str = "outfit",
        min_scale_items: int = 4,
        min_answered_items: int = 20,
        min_respondents: int = 100,
        max_fit_respondents: int = 5000,
        seed: int = 0,
        tolerance: float = 1e-5,
        max_iterations: int = 500,
    ):
        self.lower_mean_square = lower_mean_square
        self.flag_overfit = flag_overfit
        self.upper_mean_square = upper_mean_square
        self.mean_squares = mean_squares
        self.min_scale_items = min_scale_items
        self.min_answered_items = min_answered_items
        self.min_respondents = min_respondents
        self.max_fit_respondents = max_fit_respondents
        self.seed = seed
        self.tolerance = tolerance
        self.max_iterations = max_iterations

    # The reference ----------------------------------------------------------------------------

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        n = matrix.n_respondents
        reference: dict[str, Any] = {
            "model": "rating scale model, joint maximum likelihood, (L-1)/L bias correction",
            "respondents": int(n),
            "respondents_sampled": int(min(n, self.max_fit_respondents)),
            "seed": int(self.seed),
            "scales": [],
            "skipped_scales": [],
            "notes": [],
            "problem": None,
        }
        layouts = _layouts(instrument, self.min_scale_items)
        if not layouts:
            reference["problem"] = f"no scale has {self.min_scale_items} or more items"
            return reference
        if n > self.max_fit_respondents:
            chosen = np.random.default_rng(self.seed).choice(n, self.max_fit_respondents, replace=False)
            block = matrix.answers[np.sort(chosen)]
        else:
            block = matrix.answers
        for layout, name, why in layouts:
            entry = self._fit_scale(instrument, layout, block) if layout is not None else why
            if isinstance(entry, str):
                reference["skipped_scales"].append({"name": name, "reason": entry})
                reference["notes"].append(f"scale {name!r} is not modelled: {entry}")
                continue
            reference["scales"].append(entry)
            reference["notes"].extend(_scale_notes(entry))
        if not reference["scales"]:
            reference["problem"] = "no scale could be modelled: " + "; ".join(
                f"scale {s['name']!r}: {s['reason']}" for s in reference["skipped_scales"]
            )
        return reference

    def _fit_scale(
        self, instrument: Instrument, layout: _Layout, block: np.ndarray
    ) -> dict[str, Any] | str:
        """A scale's reference entry, or why the scale cannot be modelled."""
        m, n_items = layout.m, layout.n_items
        item_ids = [instrument.item_ids[c] for c in layout.columns]
        category, answered = layout.categories(block)
        values = np.where(answered, category, 0)
        count, score = answered.sum(axis=1), values.sum(axis=1)
        reached = np.stack([((values >= k) & answered).sum(axis=0) for k in range(1, m + 1)], axis=1)
        item_count = answered.sum(axis=0)
        popularity = reached / np.maximum(item_count, 1)[:, None]
        keep = (count > 0) & (score > 0) & (score < count * m)
        used = int(keep.sum())
        if used < self.min_respondents:
            return (
                f"{used} respondent{'s' * (used != 1)} of the sample answered it without an "
                f"extreme score (all lowest or all highest); at least {self.min_respondents} "
                "are needed"
            )
        category, answered, values = category[keep], answered[keep], values[keep]
        kept_count = answered.sum(axis=0)
        kept_score = values.sum(axis=0)
        for i in range(n_items):
            if kept_count[i] == 0:
                return f"item {item_ids[i]} was not answered by respondents without an extreme score"
            if kept_score[i] == 0 or kept_score[i] == m * kept_count[i]:
                side = "lowest" if kept_score[i] == 0 else "highest"
                return (
                    f"every answer to item {item_ids[i]} is in its {side} option (keyed), so "
                    "its difficulty cannot be estimated"
                )
        used_categories = np.array([((values == k) & answered).sum() for k in range(m + 1)])
        if (used_categories == 0).any():
            unused = [str(k + 1) for k in np.flatnonzero(used_categories == 0).tolist()]
            return (
                f"option{'s' * (len(unused) != 1)} {', '.join(unused)} of {m + 1} (counted in "
                f"the keyed direction) never chosen on its items, so the thresholds around "
                f"{'them' if len(unused) != 1 else 'it'} cannot be estimated"
            )
        estimate = _joint_maximum_likelihood(
            category, answered, m, self.tolerance, self.max_iterations
        )
        shrink = (n_items - 1) / n_items
        thresholds = estimate.thresholds * shrink
        return {
            "name": layout.name,
            "items": item_ids,
            "keyed": instrument.keyed[layout.columns].astype(int).tolist(),
            "points": m + 1,
            "difficulties": (estimate.difficulties * shrink).tolist(),
            "difficulty_errors": (estimate.difficulty_errors * shrink).tolist(),
            "thresholds": thresholds.tolist(),
            "threshold_errors": (estimate.threshold_errors * shrink).tolist(),
            "bias_correction": shrink,
            "step_popularity": popularity.tolist(),
            "respondents_used": used,
            "extreme_respondents": int(((count > 0) & ~keep).sum()),
            "iterations": estimate.iterations,
            "converged": estimate.converged,
            "largest_change": estimate.largest_change,
            "disordered_thresholds": [
                [j + 1, j + 2] for j in np.flatnonzero(np.diff(thresholds) <= 0).tolist()
            ],
        }

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        n = matrix.n_respondents
        states, reasons = new_states(n)
        totals = _Totals.empty(n)
        largest, largest_item = np.full(n, np.nan), np.full(n, -1, dtype=np.int64)
        layouts = _layouts(instrument, self.min_scale_items)
        plan = None
        if not layouts:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"no scale has {self.min_scale_items} or more items",
            )
        elif (mismatch := _mismatch(reference, layouts, instrument)) is not None:
            mark(states, reasons, slice(None), State.NOT_ASSESSED, mismatch)
        elif not reference.get("scales"):
            mark(states, reasons, slice(None), State.NOT_ASSESSED, str(reference.get("problem")))
        else:
            by_name = {name: layout for layout, name, _ in layouts}
            plan = _Plan.of([_model(by_name[e["name"]], e) for e in reference["scales"]])
            totals, groups, scales = _accumulate(
                plan, matrix, self.tolerance, self.max_iterations
            )
            self._mark_too_few(states, reasons, totals)
        assessed = states == State.ASSESSED
        used = totals.used.astype(np.int64)
        with np.errstate(invalid="ignore", divide="ignore"):
            outfit = np.where(assessed, totals.squared_z / totals.used, np.nan)
            infit = np.where(assessed, totals.squared_residual / totals.variance, np.nan)
        lower, upper = float(self.lower_mean_square), float(self.upper_mean_square)
        judged = [outfit] if self.mean_squares == "outfit" else [outfit, infit]
        # Ratios to the upper bound (underfit) and of the lower bound (overfit); a mean-square
        # of exactly 0 (every answer as expected) is as overfit as it gets.
        above = np.fmax.reduce([value / upper for value in judged])
        below = np.fmax.reduce([
            np.divide(lower, value, out=np.full(n, np.inf if lower > 0 else 0.0), where=value > 0)
            for value in judged
        ])
        ratio = np.where(assessed, np.minimum(np.fmax(above, below), np.finfo(np.float64).max), np.nan)
        kind = np.where(assessed, 1, 0) + ((ratio >= 1) & (above >= below)) + 2 * (
            (ratio >= 1) & (below > above)
        )
        # The score is the two-sided misfit ratio either way, so overfit still ranks a
        # respondent; without flag_overfit, an overfitting respondent's cut-off is infinite.
        score = ratio
        cutoff = np.ones(n) if self.flag_overfit else np.where(below > above, np.inf, 1.0)
        misfit = _MISFIT[kind]
        underfit = np.flatnonzero(kind == 2)
        if plan is not None and len(underfit):
            largest[underfit], largest_item[underfit] = _largest_residuals(
                plan, matrix, groups, scales, underfit
            )
        with np.errstate(invalid="ignore", divide="ignore"):
            normalised = np.where(
                assessed & (totals.guttman_max > 0), totals.guttman / totals.guttman_max, np.nan
            )
        return self._result(
            instrument,
            scores=score,
            cutoffs=cutoff,
            states=states,
            reasons=reasons,
            evidence={
                "outfit": outfit,
                "infit": infit,
                "items_used": used,
                "extreme_scales": totals.extreme_scales.astype(np.int64),
                "misfit": misfit,
                "most_unexpected_item": largest_item,
                "largest_squared_residual": largest,
                "guttman_errors": np.rint(totals.guttman).astype(np.int64),
                "guttman_errors_max": np.rint(totals.guttman_max).astype(np.int64),
                "guttman_errors_normalised": normalised,
                "judged": np.array([self.mean_squares], dtype=object)[np.zeros(n, dtype=np.intp)],
                "lower_mean_square": np.full(n, lower),
                "flag_overfit": np.full(n, bool(self.flag_overfit)),
                "upper_mean_square": np.full(n, upper),
            },
        )

    def _mark_too_few(self, states: np.ndarray, reasons: np.ndarray, totals: _Totals) -> None:
        least = self.min_answered_items
        too_few = totals.used < least
        mark(
            states, reasons, too_few & (totals.answered == 0), State.NOT_ASSESSED,
            "no item of the modelled scales answered",
        )
        everything_extreme = too_few & (totals.answered > 0) & (totals.used == 0)
        mark(
            states, reasons, everything_extreme, State.NOT_ASSESSED,
            "every answered scale has an extreme score (all answers in its lowest or all in its "
            "highest option, keyed), which carries no information about fit",
        )
        rest = too_few & (totals.used > 0)
        for used in np.unique(totals.used[rest]).astype(int).tolist():
            where = rest & (totals.used == used)
            plain = where & (totals.extreme_items == 0)
            mark(
                states, reasons, plain, State.NOT_ASSESSED,
                f"answered {used} item{'s' * (used != 1)} of the modelled scales; at least "
                f"{least} are needed",
            )
            mark(
                states, reasons, where & ~plain, State.NOT_ASSESSED,
                f"only {used} answered item{'s lie' if used != 1 else ' lies'} on scales "
                "without an extreme score (all answers in the lowest or all in the highest "
                f"option, keyed); at least {least} are needed",
            )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        lead = {
            "underfit": "answers less predictable than the rating scale model expects",
            "overfit": "answers more predictable than the rating scale model expects",
            "none": "answers fit the rating scale model",
        }[evidence["misfit"]]
        judged = "outfit or infit" if evidence["judged"] == "outfit_or_infit" else "outfit"
        used = evidence["items_used"]
        text = (
            f"{lead}: outfit {evidence['outfit']:.2f}, infit {evidence['infit']:.2f} on {used} "
            f"item{'s' * (used != 1)} (flagged when {judged} lies "
            + (
                f"outside {evidence['lower_mean_square']:g} to "
                f"{evidence['upper_mean_square']:g})"
                if evidence["flag_overfit"]
                else f"above {evidence['upper_mean_square']:g})"
            )
        )
        worst = evidence["most_unexpected_item"]
        if evidence["misfit"] == "underfit" and worst >= 0:
            text += (
                f"; most unexpected answer {item_ids[worst]} (squared standardised residual "
                f"{evidence['largest_squared_residual']:.1f})"
            )
        errors = evidence["guttman_errors"]
        text += f"; {errors} Guttman error{'s' * (errors != 1)}"
        if evidence["guttman_errors_normalised"] is not None:
            text += (
                f" ({evidence['guttman_errors_normalised']:.0%} of the most possible for these "
                "scores)"
            )
        return text


# Reference helpers -------------------------------------------------------------------------------


def reference_notes(reference: Mapping[str, Any]) -> list[str]:
    """Readable notes about the instrument from a person-fit reference: scales that could not
    be modelled, disordered thresholds, estimation that stopped before converging."""
    return [str(note) for note in reference.get("notes", [])]


def _scale_notes(entry: Mapping[str, Any]) -> list[str]:
    notes = []
    thresholds = entry["thresholds"]
    for low, high in entry["disordered_thresholds"]:
        # Threshold j (τ_j) leads from option j into option j + 1 (options 1..points, keyed),
        # so the option between two disordered thresholds is never the most likely one.
        notes.append(
            f"scale {entry['name']!r}: thresholds {low} and {high} disordered (into option "
            f"{high} at {thresholds[low - 1]:.2f} logits, into option "
            f"{high + 1} at {thresholds[high - 1]:.2f}): option {high} of {entry['points']} "
            "(keyed) is at no trait level the most likely answer; consider merging it with a "
            "neighbour"
        )
    if not entry["converged"]:
        notes.append(
            f"scale {entry['name']!r}: estimation stopped after {entry['iterations']} sweeps "
            f"with estimates still moving by {entry['largest_change']:.2g} logits"
        )
    return notes


def _model(layout: _Layout, entry: Mapping[str, Any]) -> _Model:
    popularity = np.asarray(entry["step_popularity"], dtype=np.float64)
    return _Model(
        layout=layout,
        difficulties=np.asarray(entry["difficulties"], dtype=np.float64),
        thresholds=np.asarray(entry["thresholds"], dtype=np.float64),
        positions=step_positions(popularity),
    )


def _mismatch(
    reference: Mapping[str, Any], layouts: list[tuple[_Layout | None, str, str]], instrument: Instrument
) -> str | None:
    """Why a reference does not belong to the instrument's scales (None when it does)."""
    expected = {name: layout for layout, name, _ in layouts}
    modelled = {entry["name"]: entry for entry in reference.get("scales", [])}
    skipped = {entry["name"] for entry in reference.get("skipped_scales", [])}
    if set(modelled) | skipped != set(expected) or set(modelled) & skipped:
        return (
            "the reference was estimated for other scales than the instrument's "
            f"(reference: {', '.join(sorted(set(modelled) | skipped)) or 'none'}; instrument: "
            f"{', '.join(sorted(expected))})"
        )
    for name, entry in modelled.items():
        layout = expected[name]
        if layout is None:
            return f"the reference models scale {name!r}, whose items differ in their options"
        items = [instrument.item_ids[c] for c in layout.columns]
        keyed = instrument.keyed[layout.columns].astype(int).tolist()
        if entry["items"] != items or entry["keyed"] != keyed or entry["points"] != layout.m + 1:
            return (
                f"the reference was estimated for other items, keying or options on scale "
                f"{name!r} than the instrument's"
            )
    return None
