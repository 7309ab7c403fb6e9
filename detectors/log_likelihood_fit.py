"""Standardized log-likelihood person fit (lz) under the rating scale model, over all scales."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import DetectorResult, Interval, State, new_states, row_slices
from ._rating_scale import (
    _GROUPS_PER_BLOCK,
    FIT_CONSTRAINTS,
    RatingScaleDetector,
    _group_persons,
    _mark_too_few,
    _Model,
    _Persons,
    _Plan,
    _plan_or_mark,
    category_log_probabilities,
)
from ._text import TextColumn, choose, concat, fixed, general, plain, plural
from .instrument import Instrument
from .responses import ResponseMatrix

__all__ = ["LogLikelihoodFit"]

#: Rows of the per-group table: S θ - Σ ln Γ_i(θ) over the answered items, E, Var, extreme
#: score (1/0), items answered when the score is extreme (else 0).
_FREE, _EXPECTED, _VARIANCE, _EXTREME, _EXTREME_ITEMS = range(5)


class LogLikelihoodFit(RatingScaleDetector):
    """Standardized log-likelihood of each respondent's answers under the rating scale model.

    The rating scale model (see ``person_fit``) is fitted per scale (scales of at least
    ``min_scale_items`` items, answers keyed and recoded to categories 0..m) and every
    respondent gets a maximum-likelihood θ per scale. Every answered item i of every modelled
    scale is then scored under its own scale's model at the respondent's θ for that scale,
    P_ik = P_i(X = k | θ_s(i)), and the three sums run over all those items of all scales
    together (Drasgow, Levine & Williams 1985)::

        l0  = Σ_i ln P_i(x_i)
        E   = Σ_i Σ_k P_ik ln P_ik
        Var = Σ_i [ Σ_k P_ik (ln P_ik)² - (Σ_k P_ik ln P_ik)² ]
        lz  = (l0 - E) / √Var

    l0 is the log-likelihood of the answers given, E and Var its mean and variance over the
    answers the model would give at the same θ. A low lz is a pattern the model finds
    unlikely (e.g. random answering: agreeing and disagreeing regardless of the trait); a high
    lz a pattern more regular than the model expects. The score is **-lz**, so that higher is
    more suspect, and a respondent is flagged when lz is at or below ``lz_cutoff``.

    Parameters
    ----------
    lz_cutoff : float, default -1.645
        Flag when lz is at or below this value: the one-sided 5% point of the standard normal,
        a common cut-off for lz (from memory, not checked in a source). With θ estimated the
        null distribution of lz is not standard normal (see Notes), so the screen replaces
        this cut-off by a quantile of the reference sample unless it is set explicitly.
    min_items : int >= 2, default 10
        A respondent is assessed only with at least this many answered items on modelled
        scales (not counting scales with an extreme score, see Notes). Heedful's choice: below
        about ten items lz takes few distinct values and its distribution is far from any
        standard shape, and there is little to judge a pattern by.
    min_scale_items : int >= 2, default 4
    min_respondents : int >= 10, default 100
    max_fit_respondents : int >= 100, default 5000
    seed : int >= 0, default 0
    tolerance : float > 0, default 1e-5
    max_iterations : int >= 1, default 500
        The estimation of the rating scale model, with the same meaning, defaults and reasons
        as the settings of the same names of ``person_fit``: scales of at least 4 items, at
        least 100 respondents without an extreme score per scale, at most 5,000 respondents
        (chosen at random with ``seed``) for the estimation, and the convergence criterion
        in logits, which also serves the person estimates of screening.

    Notes
    -----
    **Computation.** ln P_i(x) = x (θ - δ_i) + κ_x - ln Γ_i(θ) with κ_x = -Σ_{j<=x} τ_j and
    Γ_i(θ) the normaliser, so on a scale l0 = S θ - Σ_i ln Γ_i(θ) + Σ_i (κ_{x_i} - x_i δ_i)
    with S the raw score. The first part, E and Var depend only on which items were answered
    and the raw score, as θ does, so they are computed once per such group (the grouping of
    ``person_fit``, found once for both when they screen the same matrix under the same
    reference); the last part is summed per respondent from a table of a few numbers per
    item, in the same pass over the answers that finds the groups.

    **The reference.** ``fit`` estimates the same reference as ``person_fit`` (joint maximum
    likelihood with the (L - 1)/L bias correction; see there); with the same estimation
    settings the two are identical. Each detector keeps its own copy, since a detector is
    handed only its own reference.

    **Extreme scores.** A respondent whose answers on a scale are all in its lowest or all in
    its highest category (keyed) has no finite maximum-likelihood θ on it. As θ runs to that
    end, every one of those items gives its extreme category probability 1, so the item's
    terms of l0, E and Var all go to 0: leaving the scale out of the sums is the limit of the
    estimate, not an approximation. The evidence counts such scales, and a respondent with
    fewer than ``min_items`` items on the other scales is not assessed (one answer
    throughout is the business of ``straightlining`` and ``long_string``).

    **When it stops being valid.** lz is standard normal under the model only with θ known.
    With θ estimated from the same answers its variance lies below 1, more so on short scales
    (from memory; the example below shows fewer flags than the nominal 5%), and the corrected
    statistic for polytomous items is given by Sinharay (2016) (details from memory, not
    checked). Heedful does not correct lz: the
    screen calibrates the cut-off on the reference sample instead (``calibration =
    "reference"``), which also absorbs misfit of the model to the instrument. As with the
    mean-squares of ``person_fit``, a scale measuring more than one trait, items that depend
    on one another or response styles lower lz of attentive respondents. Answers kept near
    the middle of the scale can fit the model well (high lz) even when given at random, so a
    low score is no sign of attention. On the bfi data (five scales of 5 six-point items,
    reference from the 2,800 originals) the ROC AUC of the score is 0.92 against 200 planted
    uniform random answerers but 0.27 against 200 planted answerers drawn around the middle
    (normal, mean 3.5, SD 1, rounded), i.e. those rank as *more* model-like than the originals;
    at lz <= -1.645, 8.5% of the originals and 68% of the uniform ones are flagged (Heedful's
    computation). Flags are evidence for a human decision, not a verdict about the respondent.

    Not applicable: no scale with at least ``min_scale_items`` items. Not assessed: no scale
    could be modelled (the reference gives the reasons), the reference was estimated for other
    scales, or fewer than ``min_items`` items count for the respondent.

    References
    ----------
    Drasgow, F., Levine, M. V., & Williams, E. A. (1985). Appropriateness measurement with
    polychotomous item response models and standardized indices. British Journal of
    Mathematical and Statistical Psychology, 38(1), 67-86.

    Andrich, D. (1978). A rating formulation for ordered response categories. Psychometrika,
    43(4), 561-573.

    Sinharay, S. (2016). Asymptotically correct standardization of person-fit statistics
    beyond dichotomous items. Psychometrika, 81(4), 992-1013. (Details from memory, not
    checked.)

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> from detectors.person_fit import category_probabilities
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"{s}{i}", "scale": s} for s in "abc" for i in range(1, 9)]})
    >>> rng = np.random.default_rng(0)
    >>> eta = rng.normal(size=(500, 1)) - np.tile(np.linspace(-1, 1, 8), 3)
    >>> p, _, _ = category_probabilities(eta, np.array([-1.5, -0.5, 0.5, 1.5]))
    >>> answers = 1 + (p.cumsum(axis=-1) < rng.random((500, 24, 1))).sum(axis=-1)
    >>> answers[0] = rng.integers(1, 6, 24)  # no pattern
    >>> answers[1] = np.tile([5, 5, 5, 5, 5, 5, 5, 5], 3)  # every scale at its top
    >>> result = LogLikelihoodFit().screen(
    ...     instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> round(float(result.evidence["lz"][0]), 2), bool(result.flags[0])
    (-5.63, True)
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answer pattern unlikely under the rating scale model: lz -5.63 (log-likelihood -45.8
    against -30.0 ± 2.8 expected) on 24 items (flagged at lz -1.645 or below)
    >>> print(result.sentence_for(1))  # doctest: +NORMALIZE_WHITESPACE
    log_likelihood_fit: not assessed (every answered scale has an extreme score (all answers
    in its lowest or all in its highest option, keyed), which carries no information about
    fit).
    >>> round(float(result.flags[2:].mean()), 2)
    0.02

    The last figure, below the nominal 5% of the cut-off, shows θ being estimated (see Notes).
    """

    name = "log_likelihood_fit"
    family = "misfit"
    calibration = "reference"
    cutoff_setting = cutoff_evidence = "lz_cutoff"

    @classmethod
    def cutoff_in_evidence(cls, cutoffs: np.ndarray, params: Mapping[str, Any]) -> np.ndarray:
        return -cutoffs  # the score is minus lz
    summary = "Standardized log-likelihood (lz) of the answers under the rating scale model."
    reference = (
        "Drasgow, F., Levine, M. V., & Williams, E. A. (1985). Appropriateness measurement with "
        "polychotomous item response models and standardized indices. British Journal of "
        "Mathematical and Statistical Psychology, 38(1), 67-86."
    )
    parameter_constraints = {
        "lz_cutoff": Interval(float),
        "min_items": Interval(int, 2, None),
        **FIT_CONSTRAINTS,
    }

    def __init__(
        self,
        *,
        lz_cutoff: float = -1.645,
        min_items: int = 10,
        min_scale_items: int = 4,
        min_respondents: int = 100,
        max_fit_respondents: int = 5000,
        seed: int = 0,
        tolerance: float = 1e-5,
        max_iterations: int = 500,
    ):
        self.lz_cutoff = lz_cutoff
        self.min_items = min_items
        self.min_scale_items = min_scale_items
        self.min_respondents = min_respondents
        self.max_fit_respondents = max_fit_respondents
        self.seed = seed
        self.tolerance = tolerance
        self.max_iterations = max_iterations

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        n = matrix.n_respondents
        states, reasons = new_states(n)
        sums = np.zeros((7, n))  # l0, E, Var, used, answered, extreme scales, extreme items
        plan = _plan_or_mark(instrument, reference, self.min_scale_items, states, reasons)
        if plan is not None:
            sums = _sums(plan, matrix, self.tolerance, self.max_iterations)
            _mark_too_few(states, reasons, sums[3], sums[4], sums[6], self.min_items)
        log_likelihood, expected, variance = sums[0], sums[1], sums[2]
        assessed = states == State.ASSESSED
        with np.errstate(invalid="ignore", divide="ignore"):
            lz = np.where(assessed, (log_likelihood - expected) / np.sqrt(variance), np.nan)
        missing = np.where(assessed, 0.0, np.nan)
        return self._result(
            instrument,
            scores=-lz,
            cutoffs=-float(self.lz_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "lz": lz,
                "log_likelihood": log_likelihood + missing,
                "expected_log_likelihood": expected + missing,
                "log_likelihood_sd": np.sqrt(variance) + missing,
                "items_used": sums[3].astype(np.int64),
                "extreme_scales": sums[5].astype(np.int64),
                "lz_cutoff": np.full(n, float(self.lz_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        lz, cutoff = evidence["lz"], evidence["lz_cutoff"]
        lead = (
            "answer pattern unlikely under the rating scale model"
            if lz <= cutoff
            else "answer pattern about as likely as the rating scale model expects"
        )
        used, extreme = evidence["items_used"], evidence["extreme_scales"]
        text = (
            f"{lead}: lz {lz:.2f} (log-likelihood {evidence['log_likelihood']:.1f} against "
            f"{evidence['expected_log_likelihood']:.1f} ± {evidence['log_likelihood_sd']:.1f} "
            f"expected) on {used} item{'s' * (used != 1)} (flagged at lz {cutoff:g} or below)"
        )
        if extreme:
            text += (
                f"; {extreme} scale{'s' * (extreme != 1)} with an extreme score (all answers in "
                "the lowest or all in the highest option) left out"
            )
        return text

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        lz, cutoff = evidence["lz"], evidence["lz_cutoff"]
        lead = choose(
            lz <= cutoff,
            "answer pattern unlikely under the rating scale model",
            "answer pattern about as likely as the rating scale model expects",
        )
        used, extreme = evidence["items_used"], evidence["extreme_scales"]
        return concat(
            lead, ": lz ", fixed(lz, 2), " (log-likelihood ", fixed(evidence["log_likelihood"], 1),
            " against ", fixed(evidence["expected_log_likelihood"], 1), " ± ",
            fixed(evidence["log_likelihood_sd"], 1), " expected) on ", plain(used), " item",
            plural(used), " (flagged at lz ", general(cutoff), " or below)",
            choose(extreme != 0, concat(
                "; ", plain(extreme), " scale", plural(extreme), " with an extreme score (all "
                "answers in the lowest or all in the highest option) left out",
            ), ""),
        )


def _group_terms(model: _Model, persons: _Persons) -> np.ndarray:
    """Per score group of a scale (columns): S θ - Σ ln Γ_i(θ), E, Var, extreme score and the
    items answered then (rows as ``_FREE`` .. ``_EXTREME_ITEMS``); the first three are 0 where
    θ is not finite."""
    theta, masks, scores = persons.theta, persons.masks, persons.scores
    answered = masks.sum(axis=1)
    finite = ~np.isnan(theta)
    out = np.zeros((5, len(theta)))
    out[_EXTREME] = (answered > 0) & ~finite
    out[_EXTREME_ITEMS] = out[_EXTREME] * answered
    rows = np.flatnonzero(finite)
    for start in range(0, len(rows), _GROUPS_PER_BLOCK):
        block = rows[start : start + _GROUPS_PER_BLOCK]
        mask = masks[block]
        log_p, log_norm = category_log_probabilities(
            theta[block, None] - model.difficulties, model.thresholds
        )
        p = np.exp(log_p)
        first = (p * log_p).sum(axis=-1)
        # Rounding can leave a hair below zero where one category takes nearly all the mass.
        spread = np.maximum((p * log_p * log_p).sum(axis=-1) - first * first, 0.0)
        out[_FREE, block] = scores[block] * theta[block] - np.where(mask, log_norm, 0.0).sum(axis=1)
        out[_EXPECTED, block] = np.where(mask, first, 0.0).sum(axis=1)
        out[_VARIANCE, block] = np.where(mask, spread, 0.0).sum(axis=1)
    return out


def _sums(plan: _Plan, matrix: ResponseMatrix, tolerance: float, max_iterations: int) -> np.ndarray:
    """Per respondent (rows of the result): l0, E, Var, items counted, items answered on the
    modelled scales, scales with an extreme score and the items on them."""
    n = matrix.n_respondents
    # Σ_i (κ_{x_i} - x_i δ_i) per scale, read from a table of (block column, category); an
    # unanswered item's category (m + 1) and columns on no modelled scale read 0.
    width = max(model.layout.m for model in plan.models) + 2
    cells = np.zeros((len(plan.columns), width))
    for model, where in zip(plan.models, plan.positions, strict=True):
        m = model.layout.m
        kappa = np.concatenate([[0.0], -np.cumsum(model.thresholds)])
        cells[where, : m + 1] = kappa - np.arange(m + 1) * model.difficulties[:, None]
    # Indices as narrow as the table allows: indexing with int16 runs several times faster
    # than with int64 indices built from the int16 categories.
    flat = cells.ravel()
    start = np.arange(len(plan.columns)) * width
    start = start.astype(np.int16 if flat.size < 1 << 15 else np.int32)
    pattern = np.empty((n, len(plan.models)))

    def pattern_part(rows: slice, category: np.ndarray, answered: np.ndarray) -> None:
        pattern[rows] = flat[category + start] @ plan.indicator

    groups, counts, persons = _group_persons(
        plan, matrix, tolerance, max_iterations, row_slices, pattern_part
    )
    terms = [_group_terms(model, found) for model, found in zip(plan.models, persons, strict=True)]
    sums = np.zeros((7, n))
    for s, table in enumerate(terms):
        g = np.ascontiguousarray(groups[:, s])  # read four times
        sums[0] += table[_FREE].take(g)
        sums[1] += table[_EXPECTED].take(g)
        sums[2] += table[_VARIANCE].take(g)
        sums[6] += table[_EXTREME_ITEMS].take(g)
    # The pattern part counts on every scale except those with an extreme score, which only
    # respondents with extreme items have; they are put right on their own.
    sums[0] += pattern.sum(axis=1)
    extreme = np.flatnonzero(sums[6] > 0)
    for s, table in enumerate(terms):
        flag = table[_EXTREME].take(groups[extreme, s])
        sums[0, extreme] -= flag * pattern[extreme, s]
        sums[5, extreme] += flag
    sums[4] = counts.sum(axis=1)
    sums[3] = sums[4] - sums[6]
    return sums
