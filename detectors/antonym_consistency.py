"""Psychometric antonyms: do items the sample answers oppositely get opposite answers?"""

from __future__ import annotations

from ._base import Interval
from ._item_pairs import SHARED_CONSTRAINTS, ItemPairConsistency, settings_init

__all__ = ["AntonymConsistency"]


class AntonymConsistency(ItemPairConsistency):
    """Within-person correlation across psychometric antonyms.

    *Psychometric antonyms* are pairs of content items whose correlation in the reference
    sample is below ``pair_threshold`` (a negative number): respondents who agree with one
    tend to disagree with the other, typically a statement and its reverse-keyed counterpart.
    Answers are not reverse keyed, so the opposition shows in the sign. The within-person
    Pearson r across the pairs, first members against second members, is computed as
    described in :class:`~detectors._item_pairs.ItemPairConsistency` (which also documents the
    shared settings, the reference and when the index stops being valid). An attentive
    respondent's r is **negative**; a random answerer's is near 0, and one who agrees with
    statements and their opposites alike (acquiescence without reading) gives a positive r.
    The score is **r** itself (higher = more suspect) and a respondent is flagged when r is at
    or above ``consistency_cutoff``.

    Parameters
    ----------
    pair_threshold : float in (-1, 0), default -0.60
        Item pairs correlating below this in the reference sample are antonyms. -.60 mirrors
        the synonym threshold of Meade & Craig (2012) (from memory, not checked in the paper).
        Strongly negative pairs are rarer than strongly positive ones (reverse-keyed items
        tend to correlate less with their counterparts); with too few pairs the index is not
        applicable, with the count in the reason. A questionnaire without reverse-keyed items
        usually has none.
    consistency_cutoff : float in [-1, 1], default 0.0
        Flag a respondent whose within-person r is at or above this (Heedful's choice: the
        answers do not run opposite at all).
    min_pairs, min_pair_respondents, pairing
        Shared with ``synonym_consistency``; defaults 3, 100 and "all" (every pair below the
        threshold, an item possibly in several pairs), documented in ``ItemPairConsistency``.

    Notes
    -----
    This index complements the synonyms: agreeing with everything keeps a synonym
    correlation positive but turns an antonym correlation positive too, so acquiescent
    answering without reading shows here (and in ``acquiescence``) rather than there.

    References
    ----------
    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> opposite = [1, -1] * 4  # q2 is the reverse-keyed twin of q1, q4 of q3, ...
    >>> instrument = parse_instrument({"survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"q{i}", "keyed": k} for i, k in enumerate(opposite, 1)]})
    >>> rng = np.random.default_rng(0)
    >>> trait = rng.normal(size=(300, 4)).repeat(2, axis=1) * opposite
    >>> answers = np.clip(np.rint(3 + 1.2 * trait + rng.normal(0, 0.5, (300, 8))), 1, 5)
    >>> answers[0] = [1, 1, 4, 5, 5, 4, 2, 3]  # agrees with statements and their opposites
    >>> result = AntonymConsistency().screen(
    ...     instrument, ResponseMatrix.from_arrays(instrument, answers))  # its own reference
    >>> bool(result.flags[0]), bool(result.flags[1])
    (True, False)
    >>> print(result.sentence_for(0))  # doctest: +NORMALIZE_WHITESPACE
    answers to 4 pairs of items that the reference sample answers oppositely (r below -0.60
    there) correlate 0.86 (expected well below 0; flagged at 0.00 or more)
    """

    name = "antonym_consistency"
    summary = "Within-person correlation across item pairs the sample answers oppositely."
    direction = -1
    _answered = "oppositely"
    parameter_constraints = {
        "pair_threshold": Interval(float, -1, 0, closed="neither"),
        **SHARED_CONSTRAINTS,
    }
    __init__ = settings_init(-0.60)
