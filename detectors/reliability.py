"""Cronbach's alpha and per-scale statistics (respondents, mean, standard deviation, alpha).

Cronbach's alpha estimates how consistently the items of a scale measure one thing:

    alpha = k / (k - 1) * (1 - sum_i s_i^2 / s_total^2)

with ``k`` items, ``s_i^2`` the variance of item ``i`` and ``s_total^2`` the variance of the
summed score, i.e. the sum of every entry of the items' covariance matrix (Cronbach 1951).
Covariances use the divisor ``n - 1``.

Missing answers are handled in one of two ways (``missing``):

``"pairwise"``
    each covariance is computed over the respondents who answered both items, with the means
    of those respondents (available-case analysis); every answer is used.
``"listwise"``
    respondents who left any of the scale's items unanswered are dropped first
    (complete-case analysis).

References
----------
Cronbach, L. J. (1951). Coefficient alpha and the internal structure of tests. Psychometrika,
16(3), 297-334.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal

import numpy as np

from .errors import SettingError
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix
from .scales import MIN_ANSWERED_SHARE, scale_column, scale_scores

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "MISSING_HANDLING",
    "STATISTICS_COLUMNS",
    "item_covariance",
    "cronbach_alpha",
    "keyed_answers",
    "scale_statistics",
]

#: The two ways of handling missing answers.
MISSING_HANDLING = ("pairwise", "listwise")
#: Columns of :func:`scale_statistics`, in order.
STATISTICS_COLUMNS = ("scale", "items", "respondents", "mean", "sd", "alpha")

Missing = Literal["pairwise", "listwise"]


def _check_missing(missing: str) -> None:
    if missing not in MISSING_HANDLING:
        raise SettingError(
            "reliability", "missing",
            f"The 'missing' setting of Cronbach's alpha must be one of "
            f"{', '.join(repr(m) for m in MISSING_HANDLING)}; got {missing!r}.",
        )


def item_covariance(items: np.ndarray, missing: Missing = "pairwise") -> np.ndarray:
    """The items' covariance matrix (divisor ``n - 1``) with missing answers as NaN.

    Parameters
    ----------
    items : array of float, shape (n, k)
        Answers (reverse-keyed where the scale needs it), NaN where unanswered.
    missing : {"pairwise", "listwise"}, default "pairwise"
        Pairwise: entry (i, j) over the respondents who answered both items, centred on their
        own means of i and j. Listwise: over the respondents who answered every item.

    Returns
    -------
    ndarray of float, shape (k, k)
        NaN where fewer than two respondents answered the pair.

    Notes
    -----
    Computed with matrix products over all respondents at once (no loop over respondents or
    pairs). A pairwise matrix need not be positive semi-definite when answers are missing in
    an unbalanced way; the listwise one always is.
    """
    _check_missing(missing)
    values = np.asarray(items, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError("items must be a 2-D array (respondents x items)")
    present = ~np.isnan(values)
    if missing == "listwise":
        values = values[present.all(axis=1)]
        present = np.ones(values.shape, dtype=bool)
    # Shifting each item by a constant leaves covariances unchanged and keeps the sums small.
    with np.errstate(invalid="ignore"):
        centre = np.nanmean(values, axis=0) if len(values) else np.zeros(values.shape[1])
    centre = np.nan_to_num(centre)
    filled = np.where(present, values - centre, 0.0)
    mask = present.astype(np.float64)
    both = mask.T @ mask  # respondents who answered both items
    products = filled.T @ filled
    sums = filled.T @ mask  # sums[i, j]: sum of item i over respondents who answered j too
    with np.errstate(invalid="ignore", divide="ignore"):
        covariance = (products - sums * sums.T / both) / (both - 1)
    covariance[both < 2] = np.nan
    return covariance


def cronbach_alpha(items: np.ndarray, missing: Missing = "pairwise") -> float:
    """Cronbach's alpha of a respondents-by-items matrix.

    ``alpha = k / (k - 1) * (1 - trace(C) / sum(C))``, where ``C`` is the items' covariance
    matrix from :func:`item_covariance`: its trace is the sum of the item variances and the
    sum of all its entries is the variance of the summed score (Cronbach 1951).

    Parameters
    ----------
    items : array of float, shape (n, k)
        Answers, reverse-keyed where needed, NaN where unanswered.
    missing : {"pairwise", "listwise"}, default "pairwise"

    Returns
    -------
    float
        NaN when there are fewer than two items, a pair of items answered together by fewer
        than two respondents, or no variance in the summed score.

    Notes
    -----
    Alpha is a lower bound of reliability when the items measure one thing with equal
    loadings (essential tau-equivalence); with unequal loadings it underestimates, and with
    several dimensions it can be high without meaning one thing is measured. It grows with
    the number of items, so a long scale can reach a high alpha with weak items. It can be
    negative, which usually means an item is keyed the wrong way.

    References
    ----------
    Cronbach, L. J. (1951). Coefficient alpha and the internal structure of tests.
    Psychometrika, 16(3), 297-334.

    Examples
    --------
    >>> import numpy as np
    >>> answers = np.array([[1, 2, 2], [2, 2, 3], [3, 4, 3], [4, 5, 5], [5, 4, 4]], float)
    >>> round(cronbach_alpha(answers), 4)
    0.9286

    (Item variances 2.5, 1.8 and 1.3 sum to 5.6; the summed scores 5, 7, 10, 14, 13 have
    variance 14.7; alpha = 3/2 x (1 - 5.6/14.7) = 0.9286.)
    """
    covariance = item_covariance(items, missing)
    k = covariance.shape[0]
    if k < 2 or np.isnan(covariance).any():
        return float("nan")
    total = float(covariance.sum())
    if not total > 0:
        return float("nan")
    return float(k / (k - 1) * (1.0 - np.trace(covariance) / total))


def keyed_answers(
    instrument: Instrument, matrix: ResponseMatrix, columns: np.ndarray
) -> np.ndarray:
    """Answers of the given item columns as float, reverse-keyed (``lowest + highest - x``)
    where the item is keyed -1, NaN where unanswered."""
    answers = matrix.answers[:, columns]
    values = answers.astype(np.float64)
    reverse = instrument.keyed[columns] == -1
    flipped = (instrument.lowest[columns] + instrument.highest[columns]).astype(np.float64)
    values[:, reverse] = flipped[reverse] - values[:, reverse]
    values[answers == MISSING] = np.nan
    return values


def scale_statistics(
    instrument: Instrument,
    matrix: ResponseMatrix,
    keep: np.ndarray | None = None,
    *,
    missing: Missing = "pairwise",
    min_answered_share: float = MIN_ANSWERED_SHARE,
) -> pd.DataFrame:
    """Per scale: respondents with a score, the scores' mean and standard deviation, and
    Cronbach's alpha of the scale's items.

    Parameters
    ----------
    instrument : Instrument
    matrix : ResponseMatrix
    keep : array of bool, shape (n,), optional
        Only these respondents (e.g. everyone but the flagged); default everyone.
    missing : {"pairwise", "listwise"}, default "pairwise"
        Missing answers in alpha (see :func:`item_covariance`).
    min_answered_share : float in (0, 1], default 0.5
        A respondent's scale score (the mean of the answered items after reverse keying, from
        :func:`detectors.scales.scale_scores`) needs at least this share of the scale's items
        answered; a prorated mean from half the items is common practice (no source).

    Returns
    -------
    DataFrame
        One row per scale in instrument order, columns ``STATISTICS_COLUMNS``: ``items`` (count),
        ``respondents`` (with a score), ``mean`` and ``sd`` (divisor n - 1) of the scores, and
        ``alpha``. NaN where a statistic cannot be computed (e.g. ``sd`` of one respondent).

    Notes
    -----
    Alpha is computed on the item answers of the kept respondents, not on the scale scores, so
    respondents without a scale score still count where they answered items (pairwise).
    """
    import pandas as pd

    _check_missing(missing)
    if keep is not None:
        keep = np.asarray(keep, dtype=bool)
        if keep.shape != (matrix.n_respondents,):
            raise ValueError(
                f"keep must be a boolean array of length {matrix.n_respondents} (one per "
                f"respondent); got shape {keep.shape}"
            )
        matrix = matrix.take(keep)
    scores = scale_scores(instrument, matrix, min_answered_share=min_answered_share)
    rows = []
    for scale, columns in instrument.scales.items():
        score = scores[scale_column(scale)].to_numpy(dtype=np.float64)
        score = score[~np.isnan(score)]
        rows.append(
            {
                "scale": scale,
                "items": len(columns),
                "respondents": len(score),
                "mean": float(score.mean()) if len(score) else float("nan"),
                "sd": float(score.std(ddof=1)) if len(score) > 1 else float("nan"),
                "alpha": cronbach_alpha(keyed_answers(instrument, matrix, columns), missing),
            }
        )
    return pd.DataFrame(rows, columns=list(STATISTICS_COLUMNS))
