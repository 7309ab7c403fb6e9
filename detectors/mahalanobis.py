"""Mahalanobis distance: how far a respondent's answers lie from the sample's joint pattern."""

from __future__ import annotations

import math
import threading
import warnings
import weakref
from collections.abc import Iterator, Mapping
from typing import Any

import numpy as np

from ._base import (
    Detector,
    DetectorResult,
    Interval,
    Options,
    State,
    mark,
    new_states,
    one_blas_thread,
)
from ._text import (
    TextColumn,
    choose,
    concat,
    counted,
    fixed,
    general,
    joined,
    names_at,
    plain,
    plural,
)
from .errors import SettingError
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["Mahalanobis"]

#: Respondents converted to float64 at a time: 8,192 x 50 items is 3.3 MB per array, so a
#: chunk's arrays stay in the processor's cache between steps (measured fastest from 4,096 to
#: 16,384). Must stay below 2**24 / 81 for the float32 sums of the estimate to be exact.
_ROWS_PER_CHUNK = 1 << 13
#: Largest stack of (missing x missing) sub-matrices solved at once, in numbers (32 MB).
_SOLVE_BUDGET = 1 << 22
#: Largest accepted condition number of the item correlation matrix. A solve loses about
#: log10(condition) of float64's 16 significant digits (common practice, no source), so at 1e10
#: a squared distance keeps about 6; beyond it the estimate describes near-duplicate items.
_MAX_CONDITION = 1e10
#: Most items that contribute most to a flagged distance, named in the evidence.
_TOP_ITEMS = 3
#: Items named in a reason before "and N more".
_ITEMS_NAMED = 6


#: The squared distances last found for each matrix being screened, with the reference they
#: were found under (items, location, covariance), so that ``content_nonresponsivity`` on the
#: same matrix and reference reads them instead of finding them again. Held while the matrix
#: lives; its answers are taken as fixed, as ``ResponseMatrix.answered`` takes them.
_FOUND: weakref.WeakKeyDictionary[ResponseMatrix, tuple[Any, np.ndarray]] = (
    weakref.WeakKeyDictionary()
)
_FOUND_LOCK = threading.Lock()


def _distance_key(columns: np.ndarray, location: np.ndarray, covariance: np.ndarray) -> Any:
    return columns.tobytes(), location.tobytes(), covariance.tobytes()


def known_distances(
    matrix: ResponseMatrix, columns: np.ndarray, location: np.ndarray, covariance: np.ndarray
) -> np.ndarray | None:
    """Every respondent's D² on their answered content items (0 with none answered) under
    this location and covariance, when ``mahalanobis`` has screened this matrix with them
    (read-only); None otherwise."""
    with _FOUND_LOCK:
        known = _FOUND.get(matrix)
    if known is None or known[0] != _distance_key(columns, location, covariance):
        return None
    return known[1]


def _chunks(n: int) -> Iterator[slice]:
    for start in range(0, n, _ROWS_PER_CHUNK):
        yield slice(start, min(start + _ROWS_PER_CHUNK, n))


def _content_answers(matrix: ResponseMatrix, rows: slice, columns: np.ndarray) -> np.ndarray:
    """The answers of one chunk of respondents to the content items (a view when that is all)."""
    block = matrix.answers[rows]
    if len(columns) == block.shape[1]:  # content_items is sorted: all items, in order
        return block
    return np.take(block, columns, axis=1)


def _item_list(names: list[str]) -> str:
    """'q01', 'q01 and q02', 'q01, q02 and q03', or the first few and 'and N more'."""
    if len(names) > _ITEMS_NAMED:
        shown = names[: _ITEMS_NAMED - 1]
        return f"{', '.join(shown)} and {len(names) - len(shown)} more"
    if len(names) == 1:
        return names[0]
    return f"{', '.join(names[:-1])} and {names[-1]}"


def _singularity(
    covariance: np.ndarray, item_ids: list[str], robust: bool = False
) -> tuple[str | None, float]:
    """Why ``covariance`` cannot be inverted reliably (None when it can), and its condition
    number on the correlation scale (the scale of the items does not change D²)."""
    which = "the robust covariance" if robust else "covariance"
    among = " among the most central respondents" if robust else ""
    variance = np.diag(covariance)
    largest = float(variance.max()) if variance.size else 0.0
    # Exact zeros for the classical estimate (computed in integers); relative for a robust one.
    flat = variance <= largest * 1e-12
    if largest <= 0 or flat.any():
        names = [item_ids[i] for i in np.flatnonzero(flat | (largest <= 0))]
        verb = "has" if len(names) == 1 else "have"
        noun = "item" if len(names) == 1 else "items"
        return (
            f"{which} is singular: {noun} {_item_list(names)} {verb} no variance{among}",
            math.inf,
        )
    scale = np.sqrt(variance)
    correlation = covariance / np.outer(scale, scale)
    eigenvalues, eigenvectors = np.linalg.eigh(correlation)
    smallest, biggest = float(eigenvalues[0]), float(eigenvalues[-1])
    condition = biggest / smallest if smallest > 0 else math.inf
    if condition <= _MAX_CONDITION:
        return None, condition
    loading = np.abs(eigenvectors[:, 0])
    involved = np.flatnonzero(loading >= 0.1 * loading.max())
    involved = involved[np.argsort(-loading[involved], kind="stable")]
    names = [item_ids[i] for i in involved]
    exact = smallest <= biggest * len(variance) * np.finfo(np.float64).eps
    if exact:
        return (
            f"{which} is singular: answers to {_item_list(names)} are linear combinations "
            f"of one another{among}",
            condition,
        )
    return (
        f"{which} is nearly singular: answers to {_item_list(names)} are almost linear "
        f"combinations of one another{among} (condition number {condition:.2g}; at most "
        f"{_MAX_CONDITION:.0e} is accepted)",
        condition,
    )


def _mismatch(reference_items: list[str], item_ids: list[str]) -> str:
    """Why a stored reference does not fit the instrument's content items."""
    only_reference = [i for i in reference_items if i not in set(item_ids)]
    only_instrument = [i for i in item_ids if i not in set(reference_items)]
    parts = []
    if only_reference:
        parts.append(f"{_item_list(only_reference)} only in the reference")
    if only_instrument:
        parts.append(f"{_item_list(only_instrument)} only in the instrument")
    return "the reference was estimated on other items than the instrument's: " + (
        "; ".join(parts) if parts else "the same items in another order"
    )


def reference_unusable(reference: Mapping[str, Any], item_ids: list[str]) -> str | None:
    """Why a stored covariance reference cannot serve these content items (estimated on other
    items, or not estimable), or None."""
    if list(reference.get("items", [])) != item_ids:
        return _mismatch(list(reference.get("items", [])), item_ids)
    if reference.get("problem"):
        return str(reference["problem"])
    return None


def _precision(covariance: np.ndarray) -> np.ndarray:
    """Inverse covariance, computed on the correlation scale and made exactly symmetric."""
    scale = np.sqrt(np.diag(covariance))
    inverse = np.linalg.inv(covariance / np.outer(scale, scale)) / np.outer(scale, scale)
    return (inverse + inverse.T) / 2


def _missing_columns(missing: np.ndarray, n_missing: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The missing columns of a chunk, row after row, and where each row's run starts."""
    return np.flatnonzero(missing) % missing.shape[1], np.cumsum(n_missing) - n_missing


def _by_missing_count(
    rows: np.ndarray, n_missing: np.ndarray, layout: tuple[np.ndarray, np.ndarray] | None
) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Of the chunk positions ``rows``, those missing at least one item, grouped by how many
    they miss: yields (positions (r,), their missing columns (r, count)) per count."""
    rows = rows[n_missing[rows] > 0]
    if len(rows) == 0 or layout is None:
        return
    gone, first = layout
    order = rows[np.argsort(n_missing[rows], kind="stable")]
    counts = n_missing[order]
    starts = np.flatnonzero(np.diff(counts, prepend=-1)).tolist()
    for start, end in zip(starts, [*starts[1:], len(order)], strict=True):
        group = order[start:end]
        yield group, gone[first[group][:, None] + np.arange(counts[start])]


def _solve_missing(precision: np.ndarray, gone: np.ndarray, right: np.ndarray) -> np.ndarray:
    """y = (P_mm)^-1 right for a stack of rows that each miss the columns in a row of ``gone``
    (r, count), solved in slices whose (r, count, count) sub-matrices fit the memory budget."""
    rows, count = gone.shape
    if count == 1:  # the commonest cases, in closed form (no per-matrix solver call)
        return right / precision[gone, gone]
    if count == 2:
        a, c = precision[gone[:, 0], gone[:, 0]], precision[gone[:, 1], gone[:, 1]]
        b = precision[gone[:, 0], gone[:, 1]]
        determinant = a * c - b * b
        first = (c * right[:, 0] - b * right[:, 1]) / determinant
        second = (a * right[:, 1] - b * right[:, 0]) / determinant
        return np.stack([first, second], axis=1)
    solved = np.empty((rows, count))
    step = max(1, _SOLVE_BUDGET // (count * count))
    for start in range(0, rows, step):
        part = gone[start : start + step]
        blocks = precision[part[:, :, None], part[:, None, :]]
        solved[start : start + step] = np.linalg.solve(
            blocks, right[start : start + step, :, None]
        )[..., 0]
    return solved


class Mahalanobis(Detector):
    """Squared Mahalanobis distance of each respondent's answers from the sample's centre.

    D² = (x - m)' S^-1 (x - m), with m the mean and S the covariance of the answers (divisor
    n - 1) over the items other than attention checks, answers used **raw** (reverse keying is
    a linear recoding, which leaves D² unchanged). A large D² means an unusual combination of
    answers given how the sample answers, e.g. agreeing with two statements most respondents
    treat as opposites, or random answers on items that normally go together.

    The centre and covariance (the *reference*) are estimated from the respondents who answered
    every item (complete cases), either from the screened sample itself or once from a reference
    sample with ``fit``; the reference is a JSON-ready dict that gives identical results after a
    round trip through ``json``. A respondent with missing answers is measured on the items they
    answered, with the matching sub-vector of the mean and sub-matrix of the covariance, and
    degrees of freedom = number of answered items. Without a per-pattern inverse: with
    P = S^-1 and d the centred answers (0 where missing), the Schur complement gives
    D² = d'Pd - (Pd)_m' (P_mm)^-1 (Pd)_m, where m are the missing items; respondents are grouped
    by *how many* items they missed and the small systems are solved as stacks (in closed form
    for one or two missing items, with ``numpy.linalg.solve`` for more). The answers are read in
    chunks of 8,192 respondents, so memory stays bounded whatever the sample size.

    The score is D²; the p-value comes from the law chosen by ``distribution`` and the cut-off
    is that law's upper ``alpha`` quantile for the respondent's degrees of freedom, so a
    respondent is flagged when p < ``alpha``. The evidence gives D², the degrees of freedom, the
    p-value and, for a flagged respondent, up to three items that contribute most: item i of the
    answered items o contributes d_i (S_oo^-1 d_o)_i, and these contributions add up to D²
    exactly (only items with a positive contribution are named).

    Parameters
    ----------
    alpha : float in (0, 1), default 0.001
        Flag a respondent whose p-value is below this. p < .001 for multivariate outliers is the
        rule of Tabachnick & Fidell (data-screening chapter; cited from memory, not checked).
    distribution : {"chi2", "beta", "f"}, default "chi2"
        The law of D² used for p-values and cut-offs, with p = degrees of freedom and n = the
        number of respondents the reference was estimated on.

        - ``"chi2"``: chi-square with p degrees of freedom, the large-sample law (exact when the
          centre and covariance are known, not estimated).
        - ``"beta"``: exact for normal data when screening the very sample the reference was
          estimated from. A complete respondent, who is part of that sample, has
          n D² / (n - 1)² ~ Beta(p/2, (n - p - 1)/2) (Wilks 1962, cited from memory), so
          D² <= (n - 1)²/n; a respondent with missing answers was not part of that sample and
          follows the law below.
        - ``"f"``: exact for normal data when screening respondents *outside* the estimation
          sample (e.g. a new batch against a stored reference):
          D² n (n - p) / (p (n - 1) (n + 1)) ~ F(p, n - p) (from memory; the tests check it
          against a simulation).

        The exact laws need the classical estimate; with ``estimator="mcd"`` only ``"chi2"``
        is allowed.
    estimator : {"classical", "mcd"}, default "classical"
        ``"classical"``: the mean and covariance (divisor n - 1) of the complete cases.
        ``"mcd"``: the robust minimum covariance determinant estimate (Rousseeuw 1984; FAST-MCD,
        Rousseeuw & Van Driessen 1999) from ``sklearn.covariance.MinCovDet``, which is not
        pulled towards the outliers it should reveal. Its consistency correction changed in
        scikit-learn 1.8, so the same data give slightly different distances before and after
        that version; the reference records the version used. The classical estimate is
        checked first, so an item without variance in the whole sample is reported as such.
    min_respondents_per_item : float > 1, default 5
        The reference needs at least this many complete cases per item (and never fewer than
        items + 2). See Notes.
    min_answered_share : float in (0, 1], default 0.5
        Respondents who answered fewer than this share of the items (at least one item) are not
        assessed. Heedful's choice: a distance on a small corner of the questionnaire says
        little about the respondent's answering as a whole.
    mcd_max_respondents : int >= 100, default 5000
        ``estimator="mcd"`` only: fit on at most this many complete cases, chosen at random
        (seeded by ``seed``). FAST-MCD's time grows quickly with the sample: on 50 items it
        takes about 2.5 s for 5,000 respondents and 20 s for 20,000 on a 2-core machine.
    seed : int >= 0, default 0
        ``estimator="mcd"`` only: seed of the subsample and of MinCovDet's random starts.

    Notes
    -----
    When the method stops being valid, every respondent is *not assessed*, with the reason:

    - Too few complete cases. S can be inverted only with more respondents than items; with
      few more, its smallest eigenvalues are badly underestimated and distances inflate.
      Heedful's floor is 5 complete cases per item. What the floor costs, computed from the two
      exact laws above at n = 5 p and alpha = .001: respondents of the sample itself are
      flagged by the chi-square cut-off at 0.01 to 0.12 times the nominal rate (for p = 10 to
      50: the chi-square cut-off is conservative there), while *new* respondents screened
      against such a reference are flagged at 26 to 61 times the nominal rate (2.6% to 6.1%).
      At 20 per item these become 0.5 to 0.7 and 2.8 to 3.7 times. So: screen the sample
      itself with the default, or choose ``distribution="f"`` (or a larger reference sample)
      for new respondents against a stored reference.
    - A singular or nearly singular covariance: an item nobody varied on, or items that are
      (almost) linear combinations of others (a total score entered as an item, a duplicated
      column). Judged on the item correlation matrix: its condition number must not exceed
      1e10. A principal sub-matrix has a condition number no larger than the whole (eigenvalue
      interlacing), so every (P_mm) solved for missing answers is as well conditioned.
    - A stored reference whose items differ from the instrument's.

    Answers are discrete and bounded, so the laws above (which assume normal data) are
    approximations; treat p-values as a ranking with a sensible cut-off rather than exact error
    rates. With ``"mcd"`` on items where most respondents give one answer, the robust
    variance of such an item can shrink to almost nothing and everyone off that answer looks
    extreme; check the reference's covariance before relying on it.

    Not applicable: no items other than attention checks.

    References
    ----------
    Mahalanobis, P. C. (1936). On the generalised distance in statistics. Proceedings of the
    National Institute of Sciences of India, 2(1), 49-55.

    Wilks, S. S. (1962). Mathematical Statistics. New York: Wiley.

    Rousseeuw, P. J. (1984). Least median of squares regression. Journal of the American
    Statistical Association, 79(388), 871-880.

    Rousseeuw, P. J., & Van Driessen, K. (1999). A fast algorithm for the minimum covariance
    determinant estimator. Technometrics, 41(3), 212-223.

    Tabachnick, B. G., & Fidell, L. S. Using Multivariate Statistics. Boston: Pearson
    (the data-screening chapter).

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 5)]})
    >>> rng = np.random.default_rng(0)
    >>> trait = rng.normal(size=(200, 1))
    >>> answers = np.clip(np.rint(3 + trait + rng.normal(0, 0.5, (200, 4))), 1, 5)
    >>> answers[0] = [5, 1, 5, 1]  # opposite answers to items that go together
    >>> answers[1, 3] = np.nan
    >>> result = Mahalanobis().screen(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> bool(result.flags[0]), int(result.evidence["degrees_of_freedom"][1])
    (True, 3)
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answers far from the sample's pattern: squared distance 41.5 on 4 answered items
    (p < 0.0001; flagged from 18.5); largest contributions from q2, q3, q1
    >>> print(result.sentence_for(1))  # doctest: +NORMALIZE_WHITESPACE
    answers not unusual for the sample: squared distance 0.0 on 3 answered items
    (p = 1; flagged from 16.3)
    """

    name = "mahalanobis"
    family = "outlier"
    needs_sample = True
    summary = "Squared Mahalanobis distance from the sample's mean and covariance."
    reference = (
        "Mahalanobis, P. C. (1936). On the generalised distance in statistics. Proceedings of "
        "the National Institute of Sciences of India, 2(1), 49-55."
    )
    calibration = "reference"
    cutoff_setting = "alpha"
    cutoff_evidence = "distance_cutoff"
    parameter_constraints = {
        "alpha": Interval(float, 0, 1, closed="neither"),
        "distribution": Options(("chi2", "beta", "f")),
        "estimator": Options(("classical", "mcd")),
        "min_respondents_per_item": Interval(float, 1, None, closed="neither"),
        "min_answered_share": Interval(float, 0, 1, closed="right"),
        "mcd_max_respondents": Interval(int, 100, None),
        "seed": Interval(int, 0, 2**32 - 1),
    }

    def __init__(
        self,
        *,
        alpha: float = 0.001,
        distribution: str = "chi2",
        estimator: str = "classical",
        min_respondents_per_item: float = 5,
        min_answered_share: float = 0.5,
        mcd_max_respondents: int = 5000,
        seed: int = 0,
    ):
        self.alpha = alpha
        self.distribution = distribution
        self.estimator = estimator
        self.min_respondents_per_item = min_respondents_per_item
        self.min_answered_share = min_answered_share
        self.mcd_max_respondents = mcd_max_respondents
        self.seed = seed

    # The reference ----------------------------------------------------------------------------

    def _check_distribution(self, estimator: str) -> None:
        if estimator != "classical" and self.distribution != "chi2":
            raise SettingError(
                self.name,
                "distribution",
                f"The 'distribution' setting of {self.name} must be 'chi2' when the covariance "
                f"is estimated with {estimator!r} (the exact laws hold for the classical "
                f"estimate only); got {self.distribution!r}.",
            )

    def _fit(self, instrument: Instrument, matrix: ResponseMatrix) -> dict[str, Any]:
        self._check_distribution(self.estimator)
        columns = instrument.content_items
        p = len(columns)
        item_ids = [instrument.item_ids[c] for c in columns]
        needed = max(math.ceil(self.min_respondents_per_item * p - 1e-9), p + 2)
        reference: dict[str, Any] = {
            "estimator": self.estimator,
            "items": item_ids,
            "respondents": int(matrix.n_respondents),
            "complete_respondents": 0,
            "respondents_used": 0,
            "min_respondents": needed,
            "location": None,
            "covariance": None,
            "condition_number": None,
            "problem": None,
        }
        if p == 0:
            reference["problem"] = "the instrument has no items other than attention checks"
            return reference
        # Answers shifted to 0..points-1 (at most 9) are small integers whose sums and
        # cross-products over one chunk stay below 2**24, so float32 arithmetic on them is exact
        # and the totals are kept as integers: the estimate is exact up to one rounding per
        # entry, independent of the order of respondents, and a constant item has variance 0.
        lowest = instrument.lowest[columns]
        sums = np.zeros(p, dtype=np.int64)
        products = np.zeros((p, p), dtype=np.int64)
        complete_parts = []
        with one_blas_thread():  # small products, as in screening
            for rows in _chunks(matrix.n_respondents):
                answers = _content_answers(matrix, rows, columns)
                complete = answers.min(axis=1) != MISSING  # MISSING lies below every valid code
                if not complete.all():
                    answers = answers[complete]
                shifted = (answers - lowest).astype(np.float32)
                sums += (np.ones(len(shifted), dtype=np.float32) @ shifted).astype(np.int64)
                products += (shifted.T @ shifted).astype(np.int64)
                complete_parts.append(np.flatnonzero(complete) + rows.start)
        complete_rows = np.concatenate(complete_parts)
        count = len(complete_rows)
        reference["complete_respondents"] = count
        per_item = f"{self.min_respondents_per_item:g} per item"
        if count < needed:
            some = "no respondent" if count == 0 else f"only {count} respondent{'s' * (count != 1)}"
            reference["problem"] = (
                f"{some} answered every item; at least {needed} are needed ({per_item})"
            )
            return reference
        exact_sums = sums.tolist()
        exact_products = products.tolist()
        denominator = count * (count - 1)
        # Python integers, then one correctly rounded division per entry.
        covariance = np.array(
            [
                [
                    (count * exact_products[i][j] - exact_sums[i] * exact_sums[j]) / denominator
                    for j in range(p)
                ]
                for i in range(p)
            ]
        )
        location = np.array(
            [
                (low * count + total) / count
                for low, total in zip(lowest.tolist(), exact_sums, strict=True)
            ]
        )
        reference["respondents_used"] = count
        problem, condition = _singularity(covariance, item_ids)
        if problem is None and self.estimator == "mcd":
            if self.mcd_max_respondents < needed:
                reference["problem"] = (
                    f"mcd_max_respondents is {self.mcd_max_respondents}; at least {needed} "
                    f"respondents are needed ({per_item})"
                )
                return reference
            robust_location, robust_covariance, details = self._robust(
                matrix, columns, complete_rows
            )
            reference.update(details)
            if robust_location is None or robust_covariance is None:
                return reference
            location, covariance = robust_location, robust_covariance
            problem, condition = _singularity(covariance, item_ids, robust=True)
        reference["location"] = location.tolist()
        reference["covariance"] = covariance.tolist()
        reference["condition_number"] = None if math.isinf(condition) else condition
        reference["problem"] = problem
        return reference

    def _robust(
        self, matrix: ResponseMatrix, columns: np.ndarray, complete_rows: np.ndarray
    ) -> tuple[np.ndarray | None, np.ndarray | None, dict[str, Any]]:
        import sklearn
        from sklearn.covariance import MinCovDet

        if len(complete_rows) > self.mcd_max_respondents:
            rng = np.random.default_rng(self.seed)
            chosen = rng.choice(complete_rows, self.mcd_max_respondents, replace=False)
            complete_rows = np.sort(chosen)
        values = matrix.answers[complete_rows][:, columns].astype(np.float64)
        details: dict[str, Any] = {
            "respondents_used": len(complete_rows),
            "seed": self.seed,
            "scikit_learn_version": sklearn.__version__,
        }
        # Warnings from the estimator are kept in the reference: the result is checked below
        # like any other covariance, so they need not interrupt the caller.
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                estimate = MinCovDet(random_state=self.seed).fit(values)
            except (ValueError, np.linalg.LinAlgError) as error:
                details["problem"] = f"the robust covariance could not be estimated: {error}"
                return None, None, details
        details["estimator_warnings"] = sorted({str(w.message) for w in caught})
        details["support_size"] = int(estimate.support_.sum())
        return estimate.location_, estimate.covariance_, details

    # Screening --------------------------------------------------------------------------------

    def _cutoff_table(self, p: int, n: int) -> np.ndarray:
        """Cut-off by degrees of freedom 0..p (NaN for 0) under the chosen law, for a
        reference estimated on n respondents."""
        from scipy import stats

        df = np.arange(1, p + 1, dtype=np.float64)
        table = np.full(p + 1, np.nan)
        if self.distribution == "chi2":
            table[1:] = stats.chi2.isf(self.alpha, df)
            return table
        table[1:] = df * (n - 1) * (n + 1) / (n * (n - df)) * stats.f.isf(self.alpha, df, n - df)
        if self.distribution == "beta":  # complete respondents belong to the estimation sample
            table[p] = (n - 1) ** 2 / n * stats.beta.isf(self.alpha, p / 2, (n - p - 1) / 2)
        return table

    def _p_values(
        self, distance: np.ndarray, df: np.ndarray, p: int, n: int
    ) -> np.ndarray:
        from scipy import special, stats

        if self.distribution == "chi2":
            return special.chdtrc(df, distance)  # chi2.sf without the argument checks
        out = np.asarray(stats.f.sf(distance * n * (n - df) / (df * (n - 1) * (n + 1)), df, n - df))
        if self.distribution == "beta":
            complete = df == p
            out[complete] = stats.beta.sf(
                distance[complete] * n / (n - 1) ** 2, p / 2, (n - p - 1) / 2
            )
        return out

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        assert reference is not None  # screen() estimates one when none is given
        columns = instrument.content_items
        n, p = matrix.n_respondents, len(columns)
        states, reasons = new_states(n)
        scores = np.full(n, np.nan)
        cutoffs = np.full(n, np.nan)
        p_values = np.full(n, np.nan)
        top_items = np.full((n, _TOP_ITEMS), -1, dtype=np.int32)
        answered = np.zeros(n, dtype=np.int32)
        item_ids = [instrument.item_ids[c] for c in columns]
        if p == 0:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                "no items other than attention checks",
            )
        elif (unusable := reference_unusable(reference, item_ids)) is not None:
            mark(states, reasons, slice(None), State.NOT_ASSESSED, unusable)
        else:
            self._check_distribution(reference["estimator"])
            self._distances(
                matrix, columns, reference, states, reasons,
                scores, cutoffs, p_values, top_items, answered,
            )
        return self._result(
            instrument,
            scores=scores,
            cutoffs=cutoffs,
            states=states,
            reasons=reasons,
            evidence={
                "squared_distance": scores.copy(),
                "degrees_of_freedom": answered,
                "p_value": p_values,
                "top_items": top_items,
                "alpha": np.full(n, float(self.alpha)),
                "distance_cutoff": cutoffs.copy(),
            },
        )

    def _distances(
        self,
        matrix: ResponseMatrix,
        columns: np.ndarray,
        reference: Mapping[str, Any],
        states: np.ndarray,
        reasons: np.ndarray,
        scores: np.ndarray,
        cutoffs: np.ndarray,
        p_values: np.ndarray,
        top_items: np.ndarray,
        answered: np.ndarray,
    ) -> None:
        """Fill the per-respondent arrays chunk by chunk (float64 only for one chunk at a time)."""
        p = len(columns)
        n_reference = int(reference["respondents_used"])
        location = np.asarray(reference["location"], dtype=np.float64)
        covariance = np.asarray(reference["covariance"], dtype=np.float64)
        precision = _precision(covariance)
        by_df = self._cutoff_table(p, n_reference)
        every = np.empty(matrix.n_respondents)  # D² of everyone, for known_distances
        least = max(1, math.ceil(self.min_answered_share * p - 1e-9))
        # Buffers reused from chunk to chunk: fresh large arrays would be paged in every time.
        size = min(_ROWS_PER_CHUNK, matrix.n_respondents)
        centred_buffer, projected_buffer = np.empty((size, p)), np.empty((size, p))
        # One BLAS thread: the products are small (8,192 x p by p x p) and threads waiting
        # between them would only take processor time from the rest of the screening.
        with one_blas_thread():
            for rows in _chunks(matrix.n_respondents):
                answers = _content_answers(matrix, rows, columns)
                centred = np.subtract(answers, location, out=centred_buffer[: len(answers)])
                projected = projected_buffer[: len(answers)]
                missing = answers == MISSING
                n_missing = missing.sum(axis=1, dtype=np.intp)
                layout = None
                if n_missing.any():
                    np.multiply(centred, ~missing, out=centred)  # d = 0 where missing
                    layout = _missing_columns(missing, n_missing)
                np.matmul(centred, precision, out=projected)
                distance = np.einsum("ij,ij->i", centred, projected)
                judged = n_missing <= p - least
                # D² on the answered items: d'Pd - (Pd)_m' (P_mm)^-1 (Pd)_m (for everyone
                # with an answer, judged or not: known_distances serves them all).
                incomplete = np.flatnonzero((n_missing > 0) & (n_missing < p))
                for group, gone in _by_missing_count(incomplete, n_missing, layout):
                    right = projected[group[:, None], gone]
                    solved = _solve_missing(precision, gone, right)
                    distance[group] -= np.einsum("ij,ij->i", right, solved)
                np.maximum(distance, 0.0, out=distance)  # rounding can leave a hair below zero
                every[rows] = distance
                df = p - n_missing
                chunk_cutoffs = by_df[df]
                chunk_p = np.full(len(df), np.nan)
                chunk_p[judged] = self._p_values(distance[judged], df[judged], p, n_reference)
                flagged = judged & (distance >= chunk_cutoffs)
                top_items[rows] = self._largest_contributions(
                    precision, centred, projected, missing, n_missing, layout, flagged, columns
                )
                scores[rows] = np.where(judged, distance, np.nan)
                cutoffs[rows] = np.where(judged, chunk_cutoffs, np.nan)
                p_values[rows] = chunk_p
                answered[rows] = df
        every.flags.writeable = False
        with _FOUND_LOCK:
            _FOUND[matrix] = (_distance_key(columns, location, covariance), every)
        too_few = answered < least
        for count in np.unique(answered[too_few]).tolist():
            reason = (
                "no item answered"
                if count == 0
                else f"answered {count} of {p} items; at least {least} are needed"
            )
            where = np.flatnonzero(too_few & (answered == count))
            mark(states, reasons, where, State.NOT_ASSESSED, reason)

    @staticmethod
    def _largest_contributions(
        precision: np.ndarray,
        centred: np.ndarray,
        projected: np.ndarray,
        missing: np.ndarray,
        n_missing: np.ndarray,
        layout: tuple[np.ndarray, np.ndarray] | None,
        flagged: np.ndarray,
        columns: np.ndarray,
    ) -> np.ndarray:
        """Instrument columns of the (up to) three largest positive contributions
        d_i (S_oo^-1 d_o)_i of flagged rows; -1 elsewhere."""
        out = np.full((len(centred), _TOP_ITEMS), -1, dtype=np.int32)
        rows = np.flatnonzero(flagged)
        if len(rows) == 0:
            return out
        # S_oo^-1 d_o = (P d)_o - P_om (P_mm)^-1 (P d)_m, the complement used for D² itself.
        weights = projected[rows]
        for group, gone in _by_missing_count(rows, n_missing, layout):
            solved = _solve_missing(precision, gone, projected[group[:, None], gone])
            # P is symmetric, so P[gone] (r, count, p) holds the columns P_:m of each row.
            weights[np.searchsorted(rows, group)] -= np.einsum(
                "rip,ri->rp", precision[gone], solved
            )
        contribution = centred[rows] * weights
        contribution[missing[rows]] = -np.inf
        width = min(_TOP_ITEMS, contribution.shape[1])
        order = np.argsort(-contribution, axis=1, kind="stable")[:, :width]
        values = np.take_along_axis(contribution, order, axis=1)
        out[rows, :width] = np.where(values > 0, columns[order], -1)
        return out

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        p_value = evidence["p_value"]
        shown = "p < 0.0001" if p_value < 0.0001 else f"p = {p_value:.2g}"
        answered = evidence["degrees_of_freedom"]
        measured = (
            f"squared distance {evidence['squared_distance']:.1f} on {answered} answered "
            f"item{'s' * (answered != 1)} ({shown}; flagged from {evidence['distance_cutoff']:.1f})"
        )
        named = [item_ids[i] for i in evidence["top_items"] if i >= 0]
        if not named:
            return f"answers not unusual for the sample: {measured}"
        return (
            f"answers far from the sample's pattern: {measured}; largest "
            f"contribution{'s' * (len(named) != 1)} from {', '.join(named)}"
        )

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        p_value = evidence["p_value"]
        n = len(p_value)
        shown = choose(p_value < 0.0001, "p < 0.0001", concat("p = ", general(p_value, 2)))
        answered = evidence["degrees_of_freedom"]
        measured = concat(
            "squared distance ", fixed(evidence["squared_distance"], 1), " on ", plain(answered),
            " answered item", plural(answered), " (", shown, "; flagged from ",
            fixed(evidence["distance_cutoff"], 1), ")",
        )
        top = evidence["top_items"]
        present = [top[:, j] >= 0 for j in range(top.shape[1])]
        named = counted(present, n)
        listing = joined(
            [names_at(item_ids, np.maximum(top[:, j], 0)) for j in range(top.shape[1])], present, ", ", n
        )
        return choose(
            named == 0,
            concat("answers not unusual for the sample: ", measured),
            concat(
                "answers far from the sample's pattern: ", measured, "; largest contribution",
                plural(named), " from ", listing,
            ),
        )
