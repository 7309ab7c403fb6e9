"""Scale scores, plain and corrected for acquiescence.

A scale score is the mean of the scale's answered items after reverse keying
(``x' = lowest + highest - x`` for items keyed -1). It is computed only when at least
``min_answered_share`` of the scale's items are answered (a prorated mean; common practice, no
source); otherwise it is missing.

The acquiescence-adjusted score removes the respondent's own acquiescence before keying
(within-person centring; Soto, John, Gosling & Potter 2008, from memory). A respondent's
acquiescence is the mean raw answer over the balanced items, i.e. the items of the instrument's
opposite pairs (Winkler, Kanouse & Ware 1982, from memory): with opposite contents in equal
numbers, an attentive respondent's raw mean over them sits near the scale's midpoint whatever
their trait levels, so a raw mean above the midpoint is agreement regardless of content. Each
raw answer is centred on it, ``x_c = x - (acquiescence - midpoint)``, then keyed and averaged::

    adjusted = plain - (acquiescence - midpoint) * (positive - negative) / answered

where ``positive`` and ``negative`` count the scale's answered items of each keying. A scale
made only of positively keyed items thus loses the whole acquiescence shift; a balanced scale,
none of it (acquiescence cancels there already). The adjusted score is reported for scales
holding at least one opposite pair ("where the scale's pairs allow it"), and is missing for a
respondent who answered fewer than ``min_pairs`` complete pairs.

References
----------
Soto, C. J., John, O. P., Gosling, S. D., & Potter, J. (2008). The developmental psychometrics
of Big Five self-reports: Acquiescence, factor structure, coherence, and differentiation from
ages 10 to 20. Journal of Personality and Social Psychology, 94(4), 718-737.

Winkler, J. D., Kanouse, D. E., & Ware, J. E. (1982). Controlling for acquiescence response set
in scale development. Journal of Applied Psychology, 67(5), 555-561.
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING

import numpy as np

from .acquiescence import _pair_counts
from .errors import SettingError
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["scale_scores", "acquiescence_index", "scale_column"]

#: A prorated scale mean needs at least half of the scale's items (common practice, no source).
MIN_ANSWERED_SHARE = 0.5
#: Fewest complete opposite pairs for a respondent's acquiescence (the acquiescence detector's
#: default ``min_pairs``).
MIN_PAIRS = 3


def scale_column(scale: str, adjusted: bool = False) -> str:
    """Column name of a scale score: ``scale_<name>`` (``_adjusted`` appended for the corrected
    one); characters other than letters, digits and ``_`` become ``_``."""
    base = "scale_" + re.sub(r"[^0-9A-Za-z_]", "_", scale)
    return base + "_adjusted" if adjusted else base


def acquiescence_index(
    instrument: Instrument, matrix: ResponseMatrix, min_pairs: int = MIN_PAIRS
) -> np.ndarray:
    """Mean raw answer over the items of the complete opposite pairs, minus the midpoint;
    NaN for respondents with fewer than ``min_pairs`` complete pairs (or no pairs at all)."""
    n = matrix.n_respondents
    pairs = instrument.pairs
    if len(pairs) == 0:
        return np.full(n, np.nan)
    # the acquiescence detector's net acquiescence, counted the same way
    count, _, _, total = _pair_counts(instrument, matrix, pairs)
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = total / (2 * count)
    shift[count < min_pairs] = np.nan
    return shift


def scale_scores(
    instrument: Instrument,
    matrix: ResponseMatrix,
    *,
    min_answered_share: float = MIN_ANSWERED_SHARE,
    min_pairs: int = MIN_PAIRS,
) -> pd.DataFrame:
    """Every scale's score per respondent, plain and (where pairs allow) acquiescence-adjusted.

    Parameters
    ----------
    instrument : Instrument
    matrix : ResponseMatrix
    min_answered_share : float in (0, 1], default 0.5
        A scale score needs at least this share of the scale's items answered.
    min_pairs : int >= 1, default 3
        Complete opposite pairs a respondent needs for an acquiescence-adjusted score.

    Returns
    -------
    DataFrame
        One row per respondent of ``matrix`` (same order, default index); columns
        ``scale_<name>`` for every scale and ``scale_<name>_adjusted`` for scales holding at
        least one opposite pair. NaN where a score cannot be computed.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": "a1", "scale": "a"}, {"id": "a2", "scale": "a", "keyed": -1},
    ...               {"id": "a3", "scale": "a"}],
    ...     "opposite_pairs": [["a1", "a2"]]})
    >>> m = ResponseMatrix.from_arrays(instrument, np.array([[5, 4, 5]]))
    >>> scale_scores(instrument, m, min_pairs=1).round(2).to_dict("records")
    [{'scale_a': 4.0, 'scale_a_adjusted': 3.5}]

    (Keyed answers 5, 2, 5 average 4.0; the raw mean over the pair, 4.5, is 1.5 above the
    midpoint; centred answers 3.5, 2.5, 3.5 keyed become 3.5, 3.5, 3.5.)
    """
    import pandas as pd

    if not (isinstance(min_answered_share, int | float) and 0 < min_answered_share <= 1):
        raise SettingError(
            "scales", "min_answered_share",
            f"The 'min_answered_share' setting of scale scores must be a number in (0, 1]; "
            f"got {min_answered_share!r}.",
        )
    if not (isinstance(min_pairs, int) and not isinstance(min_pairs, bool) and min_pairs >= 1):
        raise SettingError(
            "scales", "min_pairs",
            f"The 'min_pairs' setting of scale scores must be an integer >= 1; got {min_pairs!r}.",
        )
    n = matrix.n_respondents
    columns: dict[str, np.ndarray] = {}
    pairs = instrument.pairs
    paired = set(pairs.ravel().tolist())
    shift = None
    for scale, cols in instrument.scales.items():
        answers = matrix.answers[:, cols]
        answered = answers != MISSING
        keyed = instrument.keyed[cols]
        low = instrument.lowest[cols].astype(np.float64)
        high = instrument.highest[cols].astype(np.float64)
        keyed_values = np.where(keyed == -1, low + high - answers, answers.astype(np.float64))
        count = answered.sum(axis=1)
        total = np.where(answered, keyed_values, 0.0).sum(axis=1)
        enough = count >= np.ceil(min_answered_share * len(cols) - 1e-9)
        with np.errstate(invalid="ignore", divide="ignore"):
            plain = np.where(enough & (count > 0), total / count, np.nan)
        columns[scale_column(scale)] = plain
        in_scale = set(cols.tolist())
        if not any(a in in_scale and b in in_scale for a, b in pairs.tolist()) or not paired:
            continue
        if shift is None:
            shift = acquiescence_index(instrument, matrix, min_pairs)
        balance = np.where(answered, keyed.astype(np.float64), 0.0).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            columns[scale_column(scale, adjusted=True)] = plain - shift * balance / count
    return pd.DataFrame(columns, index=pd.RangeIndex(n))
