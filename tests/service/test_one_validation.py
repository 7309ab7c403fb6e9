"""One validation path: a bad row gets the same problem (row, respondent, item, reason) from a
file (`matrix_from_frame`), a JSON post (`check_rows`, the webhook) and an import
(`import_table`, in batches), since all three check ids and answers with
`detectors.check_answers`."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detectors import ResponseDataError, matrix_from_frame, parse_instrument
from service.files import read_table
from service.imports import ImportRefused, import_table
from service.ingest import check_rows
from service.screeners import Screener

from .conftest import make_document, random_rows

URL = "/v1/surveys/pulse/responses"
ITEMS = [f"q{i + 1:02d}" for i in range(8)]


def _table(rows: list[dict]) -> pd.DataFrame:
    return pd.DataFrame(
        [{"respondent_id": row["respondent_id"], **row["answers"]} for row in rows],
        columns=["respondent_id", *ITEMS],
    )


def _found(problems) -> set[tuple]:
    return {(p.row, p.respondent_id, p.column, p.reason) for p in problems}


def test_the_same_bad_rows_get_the_same_problems_from_a_file_a_post_and_an_import(
    service, survey, settings, tmp_path
):
    rows = random_rows(6)
    rows[1]["answers"]["q03"] = 8  # the survey's items run 1..5
    rows[2]["answers"]["q05"] = 2.5
    rows[4]["respondent_id"] = rows[0]["respondent_id"]  # rows 1 and 5 share an id
    first, second, third = (rows[i]["respondent_id"] for i in range(3))
    repeated = f"respondent id {first!r} appears more than once (rows 1, 5)"
    expected = {
        (1, first, "respondent_id", repeated),
        (5, first, "respondent_id", repeated),
        (2, second, "q03", "8 is outside the answer range 1..5"),
        (3, third, "q05", "not a whole number: 2.5"),
    }
    path = tmp_path / "responses.csv"
    _table(rows).to_csv(path, index=False)

    # A file, as `heedful screen` reads it.
    instrument = parse_instrument(make_document())
    checked = matrix_from_frame(instrument, read_table(path), skip_invalid=True)
    assert _found(checked.problems) == expected
    assert checked.rejected["row"].tolist() == [1, 2, 3, 5]

    # A JSON post: every problem is listed in the 422 reply, and nothing is stored.
    reply = service.client.post(URL, json={"responses": rows},
                                headers=service.auth(service.ingest))
    assert reply.status_code == 422
    errors = reply.json()["errors"]
    assert {(e["row"], e["respondent_id"], e["item"], e["detail"]) for e in errors} == expected

    # An import in batches of two: rows 1 and 5 lie in different batches.
    with pytest.raises(ImportRefused) as refused:
        import_table(service.database, "pulse", read_table(path), settings, batch_size=2)
    assert _found(refused.value.problems) == expected

    # With partial, the post and the import store the same two rows.
    reply = service.client.post(URL, params={"partial": "true"}, json={"responses": rows},
                                headers=service.auth(service.ingest))
    assert reply.status_code == 201, reply.text
    assert [r["row"] for r in reply.json()["rejected"]] == [1, 2, 3, 5]
    assert reply.json()["stored"] == 2


def test_an_unknown_item_is_a_row_problem_in_a_post_and_a_column_problem_in_a_file(
    service, survey, settings
):
    rows = random_rows(3)
    rows[1]["answers"]["q99"] = 2
    reply = service.client.post(URL, json={"responses": rows},
                                headers=service.auth(service.ingest))
    assert reply.status_code == 422
    [error] = reply.json()["errors"]
    assert (error["row"], error["respondent_id"], error["item"], error["detail"]) == (
        2, rows[1]["respondent_id"], "q99", "unknown item: not in version 1 of survey 'pulse'"
    )
    # A file has the column for every row: the table is refused as a whole by `screen`, and
    # an import leaves the column out and says so.
    table = _table(rows).assign(q99=[None, 2, None])
    with pytest.raises(ResponseDataError) as caught:
        matrix_from_frame(parse_instrument(make_document()), table)
    assert [str(p) for p in caught.value.problems] == [
        "column 'q99': unknown column: not an item of the instrument"
    ]
    report = import_table(service.database, "pulse", table, settings)
    assert report.ignored_columns == ["q99"] and report.stored == 3


# Random posts: the webhook's check and the table's agree --------------------------------------

#: Good answers, missing ones, and the bad kinds: outside 1..5, fractional.
CELLS = st.one_of(
    st.integers(1, 5), st.none(), st.sampled_from([0, 6, 8, -3, 2.5, 4.25, 0.5])
)
#: Few ids, so that some repeat; blank ones and ones with spaces around them.
IDS = st.sampled_from(["a", "b", "c", " c", "d ", "e", "f", "g", "", "  "])
N_ITEMS = 4


@st.composite
def posts(draw) -> list[dict]:
    n = draw(st.integers(1, 12))
    ids = draw(st.lists(IDS, min_size=n, max_size=n))
    cells = draw(st.lists(st.lists(CELLS, min_size=N_ITEMS, max_size=N_ITEMS),
                          min_size=n, max_size=n))
    return [
        {"respondent_id": rid, "answers": dict(zip(ITEMS[:N_ITEMS], row, strict=True))}
        for rid, row in zip(ids, cells, strict=True)
    ]


INSTRUMENT = parse_instrument(make_document(n_items=N_ITEMS))
SCREENER = Screener(
    version_id=1, number=1, instrument=INSTRUMENT, detectors={},
    item_index={item: j for j, item in enumerate(INSTRUMENT.item_ids)},
)


@settings(max_examples=150, deadline=None)
@given(posts())
def test_a_post_and_a_table_reject_the_same_rows_and_keep_the_same_matrix(rows):
    table = pd.DataFrame(
        [[row["respondent_id"], *row["answers"].values()] for row in rows],
        columns=["respondent_id", *ITEMS[:N_ITEMS]], dtype=object,
    )
    from_table = matrix_from_frame(INSTRUMENT, table, skip_invalid=True)
    from_post = check_rows(SCREENER, rows, max_meta_bytes=-1)
    assert set(from_table.rejected["row"].tolist()) == {p + 1 for p in from_post.bad_positions}
    assert _found(from_table.problems) == _found(from_post.problems)
    assert from_table.matrix.respondent_ids.tolist() == from_post.matrix.respondent_ids.tolist()
    np.testing.assert_array_equal(from_table.matrix.answers, from_post.matrix.answers)
    # Every row with a bad cell or id is rejected, and only those (hand rule: ids non-blank
    # after stripping and unique, answers whole numbers in 1..5).
    stripped = [row["respondent_id"].strip() for row in rows]
    bad = {
        i + 1 for i, row in enumerate(rows)
        if not stripped[i] or stripped.count(stripped[i]) > 1
        or any(v is not None and (v != int(v) or not 1 <= v <= 5) for v in row["answers"].values())
    }
    assert set(from_table.rejected["row"].tolist()) == bad
