"""Person fit under the rating scale model: outfit and infit mean-squares, Guttman errors."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._base import DetectorResult, Interval, Options, State, new_states, one_blas_thread, row_slices
from ._guttman import cumulative_positions, most_guttman_errors
from ._rating_scale import (
    FIT_CONSTRAINTS,
    RatingScaleDetector,
    _group_persons,
    _mark_too_few,
    _Model,
    _Plan,
    _plan_or_mark,
    category_probabilities,
    reference_notes,
)
from ._rating_scale import _pattern_groups as _pattern_groups  # kept importable from here
from ._rating_scale import _person_estimates as _person_estimates  # kept importable from here
from ._rating_scale import _step_positions as _step_positions  # kept importable from here
from ._text import (
    TextColumn,
    choose,
    concat,
    fixed,
    general,
    mapped,
    names_at,
    percent,
    plain,
    plural,
)
from .instrument import Instrument
from .responses import ResponseMatrix

__all__ = ["PersonFit", "category_probabilities", "reference_notes"]

#: Largest lookup table built per scale, in entries (three tables of float64: 24 MB per scale
#: at most). Patterns of missing answers beyond it are computed row by row (same formulas, more
#: arithmetic); it is reached only by long scales with many different patterns of missing
#: answers.
_TABLE_ENTRIES = 1 << 20
#: Evidence "misfit" by code: not assessed, within the range, underfit, overfit.
_MISFIT = np.array([None, "none", "underfit", "overfit"], dtype=object)


# Guttman errors ----------------------------------------------------------------------------------


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
    groups, counts, persons = _group_persons(plan, matrix, tolerance, max_iterations, row_slices)
    out = []
    for model, found in zip(plan.models, persons, strict=True):
        n_items, m = model.layout.n_items, model.layout.m
        theta, masks, scores = found.theta, found.masks, found.scores
        tabled = len(theta) if len(theta) * n_items * (m + 2) <= _TABLE_ENTRIES else n_items * m + 1
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
    with one_blas_thread():
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


# The detector ------------------------------------------------------------------------------------


class PersonFit(RatingScaleDetector):
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
        "min_answered_items": Interval(int, 2, None),
        **FIT_CONSTRAINTS,
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

    # Screening --------------------------------------------------------------------------------

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        n = matrix.n_respondents
        states, reasons = new_states(n)
        totals = _Totals.empty(n)
        largest, largest_item = np.full(n, np.nan), np.full(n, -1, dtype=np.int64)
        plan = _plan_or_mark(instrument, reference, self.min_scale_items, states, reasons)
        if plan is not None:
            totals, groups, scales = _accumulate(
                plan, matrix, self.tolerance, self.max_iterations
            )
            _mark_too_few(
                states, reasons, totals.used, totals.answered, totals.extreme_items,
                self.min_answered_items,
            )
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

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        misfit = evidence["misfit"]
        lead = mapped(misfit, {
            "underfit": "answers less predictable than the rating scale model expects",
            "overfit": "answers more predictable than the rating scale model expects",
            "none": "answers fit the rating scale model",
        }.__getitem__)
        judged = choose(evidence["judged"] == "outfit_or_infit", "outfit or infit", "outfit")
        used = evidence["items_used"]
        upper = general(evidence["upper_mean_square"])
        worst = evidence["most_unexpected_item"]
        errors = evidence["guttman_errors"]
        normalised = evidence["guttman_errors_normalised"].astype(np.float64)
        return concat(
            lead, ": outfit ", fixed(evidence["outfit"], 2), ", infit ",
            fixed(evidence["infit"], 2), " on ", plain(used), " item", plural(used),
            " (flagged when ", judged, " lies ",
            choose(
                evidence["flag_overfit"].astype(bool),
                concat("outside ", general(evidence["lower_mean_square"]), " to ", upper, ")"),
                concat("above ", upper, ")"),
            ),
            choose(
                (misfit == "underfit") & (worst >= 0),
                concat(
                    "; most unexpected answer ", names_at(item_ids, np.maximum(worst, 0)),
                    " (squared standardised residual ",
                    fixed(evidence["largest_squared_residual"], 1), ")",
                ),
                "",
            ),
            "; ", plain(errors), " Guttman error", plural(errors),
            choose(
                ~np.isnan(normalised),
                concat(" (", percent(normalised), " of the most possible for these scores)"), "",
            ),
        )

