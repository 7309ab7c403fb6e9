"""speeding: hand-computed paces and the 2-second cut-off, the relative speed index against
numpy's median, states for missing and unusable durations, settings, planted speeders."""

from __future__ import annotations

import numpy as np
import pytest

from detectors import ResponseMatrix, SettingError, State, parse_instrument
from detectors.speeding import Speeding

NAN = np.nan


def instrument(k=10, extra_items=()):
    items = [{"id": f"q{i + 1:02d}"} for i in range(k)] + list(extra_items)
    return parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})


def screen(inst, rows, durations, **settings):
    matrix = ResponseMatrix.from_arrays(
        inst, np.array(rows, dtype=float), durations=np.array(durations, dtype=float)
    )
    return Speeding(**settings).screen(inst, matrix)


ROW = [1, 2, 3, 4, 5, 4, 3, 2, 1, 2]


def test_hand_computed_paces_and_the_two_second_cutoff():
    inst = instrument(10)
    rows = [ROW, ROW, ROW, [*ROW[:5], *[NAN] * 5], ROW]
    durations = [15.0, 20.0, 21.0, 9.0, 300.0]
    result = screen(inst, rows, durations)
    # hand-computed: seconds per answered item 1.5, 2.0, 2.1, 9/5 = 1.8, 30; pace = 60 / that.
    # Under 2 seconds per item (Huang et al. 2012, checked in a secondary source); exactly 2
    # is flagged (scores at or above the cut-off are flagged, 30 items per minute).
    np.testing.assert_allclose(
        result.evidence["seconds_per_item"], [1.5, 2.0, 2.1, 1.8, 30.0], rtol=1e-12
    )
    np.testing.assert_allclose(result.scores, [40.0, 30.0, 60 / 2.1, 60 / 1.8, 2.0], rtol=1e-12)
    assert result.cutoffs.tolist() == [30.0] * 5
    assert result.flags.tolist() == [True, True, False, True, False]
    # Relative speed index: median duration / duration (Leiner 2019, from memory); median of
    # the five durations is 20.
    np.testing.assert_allclose(
        result.evidence["relative_speed"], [20 / 15, 1.0, 20 / 21, 20 / 9, 20 / 300], rtol=1e-12
    )
    assert result.sentence_for(3) == (
        "1.8 seconds per answered item (9.0 s for 5 items; flagged at 2 s or less), 2.2 times "
        "as fast as the median respondent (20 s)"
    )
    assert result.sentence_for(4) == (
        "30.0 seconds per answered item (300 s for 10 items; flagged at 2 s or less), took 15.0 "
        "times as long as the median respondent (20 s)"
    )
    relaxed = screen(inst, rows, durations, seconds_per_item_cutoff=1.6)
    assert relaxed.flags.tolist() == [True, False, False, False, False]


def test_attention_checks_count_as_answered_items():
    inst = instrument(10, extra_items=({"id": "chk", "instructed_answer": 2},))
    result = screen(inst, [[*ROW, 2], [*ROW, NAN]], [22.0, 22.0])
    # hand-computed: 22 s over 11 answered items is 2.0 s per item; over 10 it is 2.2.
    np.testing.assert_allclose(result.evidence["seconds_per_item"], [2.0, 2.2], rtol=1e-12)
    assert result.flags.tolist() == [True, False]


def test_states_with_their_reasons():
    inst = instrument(10)
    values = np.array([ROW] * 6, dtype=float)
    values[5] = NAN
    durations = np.array([NAN, np.inf, -4.0, 0.0, 50.0, 50.0])
    # Built directly: reading a table refuses negative durations before any detector runs.
    matrix = ResponseMatrix.from_arrays(inst, values)
    matrix = ResponseMatrix(matrix.respondent_ids, matrix.answers, durations)
    result = Speeding().screen(inst, matrix)
    assert [result.state_of(i) for i in range(6)] == [
        State.NOT_ASSESSED, State.NOT_ASSESSED, State.NOT_ASSESSED, State.NOT_ASSESSED,
        State.ASSESSED, State.NOT_ASSESSED,
    ]
    assert result.reasons.tolist() == [
        "no duration recorded",
        "the duration is not a finite number of seconds >= 0",
        "the duration is not a finite number of seconds >= 0",
        "the duration is 0 seconds (a timing error)",
        None,
        "no item answered",
    ]
    # The median is taken over usable durations only (50 and 50).
    assert result.evidence_for(4)["median_duration_seconds"] == 50.0
    assert result.evidence_for(4)["relative_speed"] == 1.0
    without = Speeding().screen(inst, ResponseMatrix.from_arrays(inst, values))
    assert set(without.states.tolist()) == {State.NOT_ASSESSED}
    assert without.reasons[0] == "the data has no durations"
    assert without.sentence_for(0) == "speeding: not assessed (the data has no durations)."


def test_settings_are_checked():
    with pytest.raises(
        SettingError,
        match=r"The 'seconds_per_item_cutoff' setting of speeding must be a number > 0; got 0\.",
    ):
        screen(instrument(10), [ROW], [30.0], seconds_per_item_cutoff=0)


def test_planted_speeders_and_the_relative_speed_against_numpy():
    # Attentive respondents take log-normal times around 6 s per item; 40 planted speeders
    # take 0.5 to 1.9 s per item. The flags are exactly the speeders, and the relative speed
    # equals numpy's median over the durations divided by each duration.
    inst = instrument(30)
    rng = np.random.default_rng(12)
    n = 1000
    values = rng.integers(1, 6, size=(n, 30)).astype(float)
    durations = rng.lognormal(np.log(180), 0.25, n).clip(min=70)
    speeders = rng.choice(n, 40, replace=False)
    durations[speeders] = rng.uniform(0.5, 1.9, 40) * 30
    result = screen(inst, values, durations)
    assert set(np.flatnonzero(result.flags).tolist()) == set(speeders.tolist())
    np.testing.assert_allclose(
        result.evidence["relative_speed"], np.median(durations) / durations, rtol=1e-12
    )
    assert (result.evidence["relative_speed"][speeders] > 2).all()
