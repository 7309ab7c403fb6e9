"""The rating scale model shared by the person-fit detectors.

Probabilities, the per-scale layout of keyed categories, estimation of a scale's item
parameters by joint maximum likelihood (the *reference*), and person estimates for every
respondent grouped by answer pattern (which items were answered, raw score), so that a
million respondents need only a few thousand estimates per scale.
"""

from __future__ import annotations

import math
import threading
import weakref
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._base import Detector, Interval, State, mark, one_blas_thread, row_slices
from ._guttman import step_positions as _step_positions
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = [
    "FIT_CONSTRAINTS",
    "FitSettings",
    "RatingScaleDetector",
    "category_log_probabilities",
    "category_probabilities",
    "fit_reference",
    "reference_notes",
]

#: Score groups whose person estimates are iterated at once (bounds the (groups, items,
#: categories) temporaries to a few MB).
_GROUPS_PER_BLOCK = 1 << 13
#: Largest Newton step, in logits: a full step far from the solution can overshoot, and no
#: sensible estimate moves further than this in one sweep (common practice, no source).
_MAX_STEP = 1.0

# The model ---------------------------------------------------------------------------------------


def category_probabilities(
    eta: np.ndarray, thresholds: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Probabilities, expected answer and variance under the rating scale model.

    ``P(X = k) ∝ exp(Σ_{j<=k} (θ - δ_i - τ_j))`` for k = 0..m with the empty sum for k = 0,
    given ``eta = θ - δ_i`` (any shape) and the m thresholds τ_1..τ_m. Returns
    ``P`` (shape ``eta.shape + (m + 1,)``), ``E = Σ k P_k`` and ``W = Σ (k - E)² P_k``.
    """
    logits = _category_logits(eta, thresholds)
    k = np.arange(logits.shape[-1], dtype=np.float64)
    logits -= logits.max(axis=-1, keepdims=True)
    probabilities = np.exp(logits)
    probabilities /= probabilities.sum(axis=-1, keepdims=True)
    expected = probabilities @ k
    variance = probabilities @ (k * k) - expected * expected
    # Rounding can leave a hair below zero far from the thresholds; W is a divisor.
    return probabilities, expected, np.maximum(variance, 1e-300)


def category_log_probabilities(
    eta: np.ndarray, thresholds: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """``ln P(X = k)`` for k = 0..m under the rating scale model, and the log of its normaliser.

    With ``eta = θ - δ_i`` and κ_k = -Σ_{j<=k} τ_j, ``ln P(X = k) = k η + κ_k - ln Γ`` where
    ``ln Γ = ln Σ_k exp(k η + κ_k)`` (computed without overflow). Returns ``ln P`` (shape
    ``eta.shape + (m + 1,)``) and ``ln Γ`` (shape ``eta.shape``); unlike ``ln`` of
    :func:`category_probabilities` it stays finite where a probability underflows.
    """
    logits = _category_logits(eta, thresholds)
    top = logits.max(axis=-1)
    log_norm = top + np.log(np.exp(logits - top[..., None]).sum(axis=-1))
    return logits - log_norm[..., None], log_norm


def _category_logits(eta: np.ndarray, thresholds: np.ndarray) -> np.ndarray:
    """k η + κ_k for k = 0..m, κ_k = -Σ_{j<=k} τ_j (κ_0 = 0)."""
    kappa = np.concatenate([[0.0], -np.cumsum(thresholds)])
    k = np.arange(len(kappa), dtype=np.float64)
    return eta[..., None] * k + kappa


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
    out: list[tuple[_Layout | None, str, str]] = []
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

    def fingerprint(self) -> tuple[tuple[Any, ...], ...]:
        """Everything the person estimates depend on: each scale's items, keying, options,
        difficulties and thresholds."""
        return tuple(
            (
                model.layout.columns.tobytes(), model.layout.sign.tobytes(),
                model.layout.offset.tobytes(), model.layout.m,
                model.difficulties.tobytes(), model.thresholds.tobytes(),
            )
            for model in self.models
        )

    def categories(self, answers: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Keyed categories of the block (m + 1 where unanswered) and the answered mask."""
        raw = answers[:, self.first : self.first + len(self.columns)]
        answered = raw != MISSING
        category = raw.astype(np.int16) * self.sign + self.offset
        return np.where(answered, category, self.unanswered), answered


# Person estimates of every respondent -----------------------------------------------------------


@dataclass(frozen=True)
class _Persons:
    """A scale's score groups: 0..top are the respondents who answered every item (group =
    score), then each pattern of (answered items, score) of the others; θ per group (NaN for
    no answered item or an extreme score)."""

    theta: np.ndarray
    masks: np.ndarray
    scores: np.ndarray


_Grouped = tuple[np.ndarray, np.ndarray, list[_Persons]]

#: The groups and person estimates last found for each matrix being screened, with what they
#: were found under, so that detectors judging the same answers against the same model
#: (``person_fit`` and ``log_likelihood_fit`` with the same estimation settings) find them
#: once. Held while the matrix lives; its answers are taken as fixed, as
#: ``ResponseMatrix.answered`` takes them.
_FOUND: weakref.WeakKeyDictionary[ResponseMatrix, tuple[Any, _Grouped]] = (
    weakref.WeakKeyDictionary()
)
_FOUND_LOCK = threading.Lock()


def _group_persons(
    plan: _Plan,
    matrix: ResponseMatrix,
    tolerance: float,
    max_iterations: int,
    slices: Callable[[int], Iterator[slice]] = row_slices,
    each_slice: Callable[[slice, np.ndarray, np.ndarray], None] | None = None,
) -> _Grouped:
    """Every respondent's group and number of answered items on every scale (both
    (n, scales)), and each group's θ (arrays read-only: they may be shared).

    ``each_slice(rows, category, answered)`` is called once per block of rows with the
    block's keyed categories and answered mask, for sums a caller needs beside the groups: in
    the pass that finds the groups (one pass over the answers instead of two), or in a pass of
    its own when the groups of this matrix under this model are known already (``_FOUND``).
    """
    key = (plan.fingerprint(), tolerance, max_iterations)
    with _FOUND_LOCK:
        known = _FOUND.get(matrix)
    if known is not None and known[0] == key:
        if each_slice is not None:
            with one_blas_thread():  # as in the grouping pass
                for rows in slices(matrix.n_respondents):
                    each_slice(rows, *plan.categories(matrix.answers[rows]))
        return known[1]
    grouped = _find_groups(plan, matrix, tolerance, max_iterations, slices, each_slice)
    for array in (grouped[0], grouped[1], *(a for p in grouped[2] for a in vars(p).values())):
        array.flags.writeable = False
    with _FOUND_LOCK:
        _FOUND[matrix] = (key, grouped)
    return grouped


def _find_groups(
    plan: _Plan,
    matrix: ResponseMatrix,
    tolerance: float,
    max_iterations: int,
    slices: Callable[[int], Iterator[slice]],
    each_slice: Callable[[slice, np.ndarray, np.ndarray], None] | None,
) -> _Grouped:
    """The work of :func:`_group_persons`."""
    n, n_scales = matrix.n_respondents, len(plan.models)
    groups = np.empty((n, n_scales), dtype=np.int64)
    counts = np.empty((n, n_scales), dtype=np.int16)
    partial: list[list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = [[] for _ in plan.models]
    sizes = np.array([model.layout.n_items for model in plan.models])
    # Score and count of every scale from one product: Σ (x + K) over the answered items is
    # S + K n with 0 <= S < K. The sums are integers, exact in float32 below 2^24 (half the
    # memory traffic of float64), otherwise in float64.
    shift = int(max(model.layout.n_items * model.layout.m for model in plan.models)) + 1
    dtype: type[np.floating[Any]] = (
        np.float32 if shift * (int(sizes.max()) + 1) < 1 << 24 else np.float64
    )
    indicator = plan.indicator.astype(dtype)
    shift_code = np.array(shift, dtype=np.int16 if shift < 1 << 14 else np.int32)
    # One BLAS thread: the products are small and threads would only wait between them.
    with one_blas_thread():
        for rows in slices(n):
            category, answered = plan.categories(matrix.answers[rows])
            packed = np.where(answered, category + shift_code, 0).astype(dtype) @ indicator
            count, score = np.divmod(packed.astype(np.int64), shift)
            groups[rows] = score
            counts[rows] = count
            if each_slice is not None:
                each_slice(rows, category, answered)
            short = count < sizes
            some = np.flatnonzero(short.any(axis=1))
            if len(some) == 0:
                continue
            short, some_answered = short[some], answered[some]
            for s in np.flatnonzero(short.any(axis=0)).tolist():
                missed = some[short[:, s]]
                partial[s].append((
                    missed + rows.start,
                    some_answered[short[:, s]][:, plan.positions[s]],
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
        out.append(_Persons(theta, masks, scores))
    return groups, counts, out


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


# The reference ----------------------------------------------------------------------------------


#: Constraints of the estimation's settings (see :class:`FitSettings`).
FIT_CONSTRAINTS = {
    "min_scale_items": Interval(int, 2, None),
    "min_respondents": Interval(int, 10, None),
    "max_fit_respondents": Interval(int, 100, None),
    "seed": Interval(int, 0, 2**32 - 1),
    "tolerance": Interval(float, 0, None, closed="neither"),
    "max_iterations": Interval(int, 1, None),
}


@dataclass(frozen=True)
class FitSettings:
    """The settings of the estimation, held under the same names by every detector using it."""

    min_scale_items: int
    min_respondents: int
    max_fit_respondents: int
    seed: int
    tolerance: float
    max_iterations: int

    @classmethod
    def of(cls, detector: Any) -> FitSettings:
        return cls(**{name: getattr(detector, name) for name in cls.__dataclass_fields__})


class RatingScaleDetector(Detector):
    """A detector judging respondents against the rating scale model: its reference is the
    model's estimate (:func:`fit_reference`) under the settings named in :class:`FitSettings`."""

    needs_sample = True

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        return fit_reference(instrument, matrix, FitSettings.of(self))


def fit_reference(
    instrument: Instrument, matrix: ResponseMatrix, settings: FitSettings
) -> dict[str, Any]:
    """The reference of the rating scale model estimated from a sample (JSON-ready): every
    modelled scale's parameters, the scales that could not be modelled, readable notes."""
    n = matrix.n_respondents
    reference: dict[str, Any] = {
        "model": "rating scale model, joint maximum likelihood, (L-1)/L bias correction",
        "respondents": int(n),
        "respondents_sampled": int(min(n, settings.max_fit_respondents)),
        "seed": int(settings.seed),
        "scales": [],
        "skipped_scales": [],
        "notes": [],
        "problem": None,
    }
    layouts = _layouts(instrument, settings.min_scale_items)
    if not layouts:
        reference["problem"] = f"no scale has {settings.min_scale_items} or more items"
        return reference
    if n > settings.max_fit_respondents:
        chosen = np.random.default_rng(settings.seed).choice(n, settings.max_fit_respondents, replace=False)
        block = matrix.answers[np.sort(chosen)]
    else:
        block = matrix.answers
    for layout, name, why in layouts:
        entry = _fit_scale(instrument, layout, block, settings) if layout is not None else why
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
    instrument: Instrument, layout: _Layout, block: np.ndarray, settings: FitSettings
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
    if used < settings.min_respondents:
        return (
            f"{used} respondent{'s' * (used != 1)} of the sample answered it without an "
            f"extreme score (all lowest or all highest); at least {settings.min_respondents} "
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
        category, answered, m, settings.tolerance, settings.max_iterations
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
        positions=_step_positions(popularity),
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


# Screening helpers -------------------------------------------------------------------------------


def _plan_or_mark(
    instrument: Instrument,
    reference: Mapping[str, Any],
    min_scale_items: int,
    states: np.ndarray,
    reasons: np.ndarray,
) -> _Plan | None:
    """The modelled scales of a reference laid over the instrument; None, with every
    respondent marked, when no scale is long enough (not applicable), or the reference belongs
    to other scales or models none (not assessed)."""
    layouts = _layouts(instrument, min_scale_items)
    if not layouts:
        mark(
            states, reasons, slice(None), State.NOT_APPLICABLE,
            f"no scale has {min_scale_items} or more items",
        )
    elif (mismatch := _mismatch(reference, layouts, instrument)) is not None:
        mark(states, reasons, slice(None), State.NOT_ASSESSED, mismatch)
    elif not reference.get("scales"):
        mark(states, reasons, slice(None), State.NOT_ASSESSED, str(reference.get("problem")))
    else:
        by_name = {name: layout for layout, name, _ in layouts if layout is not None}
        return _Plan.of([_model(by_name[e["name"]], e) for e in reference["scales"]])
    return None


def _mark_too_few(
    states: np.ndarray,
    reasons: np.ndarray,
    used: np.ndarray,
    answered: np.ndarray,
    extreme_items: np.ndarray,
    least: int,
) -> None:
    """Mark not assessed the respondents with fewer than ``least`` items counted (answered, on
    a modelled scale without an extreme score), saying why."""
    too_few = used < least
    mark(
        states, reasons, too_few & (answered == 0), State.NOT_ASSESSED,
        "no item of the modelled scales answered",
    )
    everything_extreme = too_few & (answered > 0) & (used == 0)
    mark(
        states, reasons, everything_extreme, State.NOT_ASSESSED,
        "every answered scale has an extreme score (all answers in its lowest or all in its "
        "highest option, keyed), which carries no information about fit",
    )
    rest = too_few & (used > 0)
    for count in np.unique(used[rest]).astype(int).tolist():
        where = rest & (used == count)
        plain = where & (extreme_items == 0)
        mark(
            states, reasons, plain, State.NOT_ASSESSED,
            f"answered {count} item{'s' * (count != 1)} of the modelled scales; at least "
            f"{least} are needed",
        )
        mark(
            states, reasons, where & ~plain, State.NOT_ASSESSED,
            f"only {count} answered item{'s lie' if count != 1 else ' lies'} on scales "
            "without an extreme score (all answers in the lowest or all in the highest "
            f"option, keyed); at least {least} are needed",
        )
