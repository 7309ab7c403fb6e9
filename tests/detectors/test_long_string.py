"""long_string: hand-computed runs, the derived cut-off's probability, evidence and states."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from detectors import SettingError, State
from detectors.long_string import LongString, chance_of_run, default_run_cutoff
from tests.conftest import make_instrument, matrix

NAN = np.nan


def run(rows, **settings):
    inst = make_instrument(n_items=len(rows[0]))
    return LongString(**settings).screen(inst, matrix(inst, rows))


def test_longest_run_by_hand():
    # Counted by hand: 1,1,2,2,2,3,3,3,3,1 has runs of 2, 3, 4 and 1; the longest is 4 (of 3s).
    result = run([[1, 1, 2, 2, 2, 3, 3, 3, 3, 1]], run_cutoff=4)
    assert result.scores[0] == 4
    assert result.evidence_for(0)["answer"] == 3
    assert result.sentence_for(0) == (
        "same answer, 3, on 4 items in a row, q06 to q09 (flagged from 4 in a row)"
    )
    assert result.flags[0]


def test_missing_answer_ends_a_run_and_first_longest_run_wins():
    # hand-computed: runs 2 (q01-q02), broken by a gap, then 2 (q04-q05), then 1
    result = run([[4, 4, NAN, 4, 4, 5], [NAN] * 6, [2, 2, 2, 2, 2, 2]], run_cutoff=6)
    assert result.scores[0] == 2
    assert result.evidence_for(0)["first_item"] == 0 and result.evidence_for(0)["last_item"] == 1
    assert result.state_of(1) is State.NOT_ASSESSED and result.reasons[1] == "no item answered"
    assert np.isnan(result.scores[1]) and not result.flags[1]
    assert result.scores[2] == 6 and result.flags[2]
    assert result.flags.tolist() == [False, False, True]


def test_attention_checks_are_left_out_of_the_sequence():
    from detectors import parse_instrument

    inst = parse_instrument(
        {
            "survey": "t",
            "response_format": {"points": 5},
            "items": [
                {"id": "a"}, {"id": "b"}, {"id": "chk", "instructed_answer": 1}, {"id": "c"},
            ],
        }
    )
    result = LongString(run_cutoff=3).screen(inst, matrix(inst, [[3, 3, 1, 3]]))
    assert result.scores[0] == 3
    assert result.sentence_for(0).endswith("a to c (flagged from 3 in a row)")


def brute_force_chance(n: int, length: int) -> float:
    """Fraction of all 2**n coin-toss sequences holding a run of >= length equal tosses.

    Each toss equals the previous one with probability 1/2, the model of chance_of_run with
    repeat_probability 0.5; enumeration is an independent check of the Markov chain.
    """
    hits = 0
    for seq in itertools.product((0, 1), repeat=n):
        longest = current = 1
        for a, b in itertools.pairwise(seq):
            current = current + 1 if a == b else 1
            longest = max(longest, current)
        hits += longest >= length
    return hits / 2**n


@pytest.mark.parametrize("n, length", [(4, 2), (4, 4), (8, 3), (10, 4), (12, 5), (12, 1)])
def test_chance_of_run_matches_enumeration(n, length):
    assert chance_of_run(n, length, 0.5) == pytest.approx(brute_force_chance(n, length), abs=1e-12)


def test_chance_of_run_matches_simulation_for_uniform_five_point_answers():
    # Uniform random answers on 5 points repeat the previous answer with probability 1/5;
    # a seeded numpy simulation is the outside check (tolerance: 4 standard errors).
    rng = np.random.default_rng(7)
    sims = rng.integers(1, 6, size=(40_000, 20))
    inst = make_instrument(n_items=20)
    observed = LongString(run_cutoff=4).screen(inst, matrix(inst, sims)).flags.mean()
    expected = chance_of_run(20, 4, 0.2)
    assert abs(observed - expected) < 4 * np.sqrt(expected * (1 - expected) / 40_000)


def test_default_cutoff_grows_with_length_and_is_capped():
    cutoffs = [default_run_cutoff(k, 0.5, 0.001) for k in (10, 25, 50, 240)]
    assert cutoffs == sorted(cutoffs) and cutoffs[0] == 10
    for k, c in zip((25, 50, 240), cutoffs[1:], strict=True):
        assert chance_of_run(k, c, 0.5) <= 0.001 < chance_of_run(k, c - 1, 0.5)


def test_settings_are_checked_when_screening():
    inst = make_instrument(n_items=4)
    with pytest.raises(SettingError, match=r"The 'run_cutoff' setting of long_string must be an integer >= 2 or null; got 1\."):
        LongString(run_cutoff=1).screen(inst, matrix(inst, [[1, 2, 3, 4]]))
    with pytest.raises(SettingError, match="alpha"):
        LongString(alpha=1.5).screen(inst, matrix(inst, [[1, 2, 3, 4]]))


def test_vectorised_result_equals_a_plain_reference_loop():
    rng = np.random.default_rng(3)
    rows = rng.integers(1, 4, size=(300, 15)).astype(float)
    rows[rng.random(rows.shape) < 0.1] = np.nan
    result = run(rows.tolist(), run_cutoff=5)
    for r, values in enumerate(rows):  # the test's own per-row loop is the oracle
        longest = current = 0
        previous = None
        for v in values:
            current = current + 1 if (not np.isnan(v) and v == previous) else (0 if np.isnan(v) else 1)
            previous = None if np.isnan(v) else v
            longest = max(longest, current)
        if longest:
            assert result.scores[r] == longest
