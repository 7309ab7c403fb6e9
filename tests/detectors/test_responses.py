"""Building the response matrix from a table: conversion and every bad-input path."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import MISSING, ResponseDataError, matrix_from_frame
from tests.conftest import make_instrument


@pytest.fixture()
def inst():
    return make_instrument(n_items=3)


def frame(rows, columns=("respondent_id", "q01", "q02", "q03")):
    return pd.DataFrame(rows, columns=list(columns))


def test_valid_table_with_missing_cells(inst):
    checked = matrix_from_frame(inst, frame([["a", 1, 2, None], ["b", 5, "", 3]]).astype(object))
    m = checked.matrix
    assert m.respondent_ids.tolist() == ["a", "b"]
    assert m.answers.tolist() == [[1, 2, MISSING], [5, MISSING, 3]]
    assert m.answered.tolist() == [[True, True, False], [True, False, True]]
    assert np.isnan(m.as_float()[0, 2])
    assert checked.problems == [] and checked.rejected.empty


def test_every_cell_problem_is_listed_with_row_and_column(inst):
    table = frame(
        [["a", 1, 2, 3], ["b", 2.5, 9, "x"], ["a", 1, 1, 1], ["", 1, 1, 1]]
    ).astype(object)
    with pytest.raises(ResponseDataError) as caught:
        matrix_from_frame(inst, table)
    text = [str(p) for p in caught.value.problems]
    assert "row 2, respondent 'b', column 'q01': not a whole number: 2.5" in text
    assert "row 2, respondent 'b', column 'q02': 9 is outside the answer range 1..5" in text
    assert "row 2, respondent 'b', column 'q03': not a number: 'x'" in text
    assert any(t.startswith("row 3, respondent 'a'") and "appears more than once" in t for t in text)
    assert any(t.startswith("row 1, respondent 'a'") and "appears more than once" in t for t in text)
    assert "row 4, column 'respondent_id': respondent id is empty" in text
    assert "(rows 1, 3)" in str(caught.value)


def test_message_shows_first_twenty_and_the_count(inst):
    rows = [[f"r{i}", 9, 1, 1] for i in range(30)]
    with pytest.raises(ResponseDataError) as caught:
        matrix_from_frame(inst, frame(rows))
    message = str(caught.value)
    assert "30 problem(s)" in message and "... and 10 more" in message
    assert message.count("\n  - ") == 20


def test_table_problems_always_raise(inst):
    table = frame([["a", 1, 2, 3]], columns=("id", "q01", "q02", "extra"))
    with pytest.raises(ResponseDataError) as caught:
        matrix_from_frame(inst, table, skip_invalid=True)
    text = [str(p) for p in caught.value.problems]
    assert "column 'respondent_id': respondent id column is missing" in text
    assert "column 'q03': item column is missing" in text
    assert "column 'id': unknown column: not an item of the instrument" in text


def test_skip_invalid_keeps_valid_rows_and_reports_rejected(inst):
    table = frame([["a", 1, 2, 3], ["b", 7, 2, 3], ["c", 3, 3, 3]])
    checked = matrix_from_frame(inst, table, skip_invalid=True)
    assert checked.matrix.respondent_ids.tolist() == ["a", "c"]
    assert checked.rejected["respondent_id"].tolist() == ["b"]
    assert checked.rejected["row"].tolist() == [2]
    assert checked.rejected["reason"].iloc[0] == "q01: 7 is outside the answer range 1..5"


def test_durations_are_read_and_checked(inst):
    table = frame([["a", 1, 2, 3, 120.0], ["b", 1, 2, 3, None]],
                  columns=("respondent_id", "q01", "q02", "q03", "duration_seconds"))
    checked = matrix_from_frame(inst, table)
    assert checked.matrix.durations[0] == 120.0 and np.isnan(checked.matrix.durations[1])
    table.loc[1, "duration_seconds"] = -5
    with pytest.raises(ResponseDataError, match="duration must be a number of seconds"):
        matrix_from_frame(inst, table)


def test_from_arrays_rejects_bad_shape(inst):
    from detectors import ResponseMatrix

    with pytest.raises(ValueError, match=r"shape \(n, 3\)"):
        ResponseMatrix.from_arrays(inst, np.ones((2, 4)))


def test_check_answers_names_given_rows_and_leaves_bad_cells_missing(inst):
    from detectors import check_answers

    values = np.array([[1, 5, np.nan], [0, 2.5, 3], [4, 4, 4]])
    checked = check_answers(inst, values, ["a", " b ", "c"], rows=[10, 20, 30])
    assert checked.answers.tolist() == [[1, 5, MISSING], [MISSING, MISSING, 3], [4, 4, 4]]
    assert checked.answers.dtype == np.int8
    assert checked.invalid.tolist() == [False, True, False]
    assert checked.respondent_ids.tolist() == ["a", "b", "c"]
    assert [str(p) for p in checked.problems] == [
        "row 20, respondent 'b', column 'q01': 0 is outside the answer range 1..5",
        "row 20, respondent 'b', column 'q02': not a whole number: 2.5",
    ]
    # Without ids, only the answers are checked and no respondent is named.
    checked = check_answers(inst, values)
    assert checked.respondent_ids is None and checked.invalid.tolist() == [False, True, False]
    assert checked.problems[0].respondent_id is None and checked.problems[0].row == 2
    with pytest.raises(ValueError, match=r"shape \(n, 3\)"):
        check_answers(inst, np.ones((2, 4)))


def test_a_repeated_id_names_its_first_five_rows_on_every_row():
    from detectors import check_respondent_ids

    ids = ["x"] * 7 + ["y", "", None, float("nan"), " y"]
    checked = check_respondent_ids(ids, id_column="rid")
    assert checked.invalid.tolist() == [True] * 12
    reasons = {(p.row, p.respondent_id, p.column, p.reason) for p in checked.problems}
    x_reason = "respondent id 'x' appears more than once (rows 1, 2, 3, 4, 5 ...)"
    y_reason = "respondent id 'y' appears more than once (rows 8, 12)"
    assert reasons == (
        {(r, "x", "rid", x_reason) for r in range(1, 8)}
        | {(8, "y", "rid", y_reason), (12, "y", "rid", y_reason)}
        | {(r, None, "rid", "respondent id is empty") for r in (9, 10, 11)}
    )
    assert [p.row for p in checked.problems] == list(range(1, 13))
    assert checked.respondent_ids.tolist()[7:] == ["y", None, None, None, "y"]


def test_a_few_ids_are_read_as_a_column_of_many_is():
    # The plain-Python reading of a few ids and pandas' string column (the reference) agree.
    import pandas as pd

    from detectors.responses import check_respondent_ids

    rng = np.random.default_rng(3)
    pool = ["a", " a", "b ", "", "  ", None, float("nan"), pd.NA, 7, 7.0, 1.5, "c", "é", True]
    for _ in range(200):
        ids = [pool[i] for i in rng.integers(0, len(pool), size=int(rng.integers(1, 12)))]
        few = check_respondent_ids(ids)
        many = check_respondent_ids(pd.Series(ids, dtype=object))
        assert few.respondent_ids.tolist() == many.respondent_ids.tolist(), ids
        assert few.invalid.tolist() == many.invalid.tolist(), ids
        assert few.problems == many.problems, ids
