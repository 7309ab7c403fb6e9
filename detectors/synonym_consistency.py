"""Psychometric synonyms: do items the sample answers alike get alike answers from the respondent?"""

from __future__ import annotations

from ._base import Interval
from ._item_pairs import SHARED_CONSTRAINTS, ItemPairConsistency, settings_init

__all__ = ["SynonymConsistency"]


class SynonymConsistency(ItemPairConsistency):
    """Within-person correlation across psychometric synonyms.

    *Psychometric synonyms* are pairs of content items whose correlation in the reference
    sample is above ``pair_threshold``: whatever their wording, respondents answer them alike.
    Two items keyed in opposite directions correlate negatively on raw answers and are
    candidates for ``antonym_consistency`` instead. The within-person Pearson r across the
    pairs, first members against second members, is computed as described in
    :class:`~detectors._item_pairs.ItemPairConsistency` (which also documents the shared
    settings, the reference and when the index stops being valid). An attentive respondent who
    agrees more with one pair's statements than with another's does so on both members, so r
    is high; a random answerer's r is near 0. The score is **-r** (higher = more suspect) and a
    respondent is flagged when r is at or below ``consistency_cutoff``.

    Parameters
    ----------
    pair_threshold : float in (0, 1), default 0.60
        Item pairs correlating above this in the reference sample are synonyms. .60 is the
        threshold of Meade & Craig (2012) (from memory, not checked in the paper). A short
        instrument or one with heterogeneous items may have too few such pairs: the index is
        then not applicable, with the count in the reason.
    consistency_cutoff : float in [-1, 1], default 0.0
        Flag a respondent whose within-person r is at or below this (Heedful's choice: no
        consistency at all).
    min_pairs, min_pair_respondents, pairing
        Shared with ``antonym_consistency``; defaults 3, 100 and "all" (every pair above the
        threshold, an item possibly in several pairs), documented in ``ItemPairConsistency``.

    Notes
    -----
    Synonym pairs are usually more numerous than antonym pairs, since items of one scale
    keyed alike tend to correlate most; on a long multi-scale questionnaire this is the more
    widely applicable of the two indices. It is blind to straightlining (r undefined, not
    assessed) and weak against acquiescence, which raises both members of every pair alike.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}"} for i in range(1, 9)]})
    >>> rng = np.random.default_rng(0)
    >>> trait = rng.normal(size=(300, 4)).repeat(2, axis=1)  # q1-q2, q3-q4, ... go together
    >>> answers = np.clip(np.rint(3 + 1.2 * trait + rng.normal(0, 0.5, (300, 8))), 1, 5)
    >>> answers[0] = [1, 5, 4, 2, 5, 2, 2, 3]
    >>> detector = SynonymConsistency()
    >>> reference = detector.fit(instrument, ResponseMatrix.from_arrays(instrument, answers))
    >>> reference["pairs"]
    [['q1', 'q2'], ['q3', 'q4'], ['q5', 'q6'], ['q7', 'q8']]
    >>> new = ResponseMatrix.from_arrays(instrument, answers[:2])  # screened against the reference
    >>> result = detector.screen(instrument, new, reference)
    >>> bool(result.flags[0]), bool(result.flags[1])
    (True, False)
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answers to 4 pairs of items that the reference sample answers alike (r above 0.60 there)
    correlate -0.90 (expected well above 0; flagged at 0.00 or less)
    """

    name = "synonym_consistency"
    summary = "Within-person correlation across item pairs the sample answers alike."
    direction = 1
    _answered = "alike"
    parameter_constraints = {
        "pair_threshold": Interval(float, 0, 1, closed="neither"),
        **SHARED_CONSTRAINTS,
    }
    __init__ = settings_init(0.60)
