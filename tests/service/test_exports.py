"""Exports: every format read back (pandas, pyreadstat) equals what was stored, with labels;
leaving out excluded and flagged respondents; the endpoint and the command."""

from __future__ import annotations

import csv
import io
import re
from typing import get_args

import numpy as np
import pandas as pd
import pyreadstat
import pytest
from sqlalchemy import select

from detectors import REGISTRY, ResponseMatrix, State, parse_instrument
from detectors.scales import scale_scores
from service import exports, file_commands, outcomes, store, survey_data
from service.api import exports as export_api
from service.cli import main
from service.files import formula_safe, write_csv
from service.models import Respondent
from service.stat_files import NAME_LIMITS, statistical_names

from .conftest import make_document, random_rows, stored_results

BASE = "/v1/surveys/pulse"
LABELS = ["Strongly disagree", "Disagree", "Neither", "Agree", "Strongly agree"]
EXTRA = "q-09.extra"
EXTRA_LABELS = ["Never", "Rarely", "Sometimes", "Often", "Very often", "Always", "Every day"]


def _document() -> dict:
    document = make_document()
    document["response_format"]["labels"] = LABELS
    document["items"].append(
        {"id": EXTRA, "text": "How often do you volunteer on weekends?",
         "response_format": {"points": 7, "lowest": 0, "labels": EXTRA_LABELS}}
    )
    return document


@pytest.fixture
def stored(service):
    """A survey with 80 respondents (some straight-lining, a few gaps), two of them reviewed."""
    document = _document()
    reply = service.client.post("/v1/surveys", json=document, headers=service.auth(service.admin))
    assert reply.status_code == 201, reply.text
    rows = random_rows(80, seed=11)
    rng = np.random.default_rng(3)
    for row, extra in zip(rows, rng.integers(0, 7, len(rows)).tolist(), strict=True):
        row["answers"][EXTRA] = None if extra == 3 else extra
    rows[5]["duration_seconds"] = 312.5
    rows[5]["submitted_at"] = "2027-05-04T09:30:00.250000+02:00"
    reply = service.client.post(
        f"{BASE}/responses", json={"responses": rows}, headers=service.auth(service.ingest)
    )
    assert reply.status_code == 201, reply.text
    for rid, decision in (("r00002", "exclude"), ("r00003", "keep"), ("r00002", "undecided"),
                          ("r00004", "keep"), ("r00004", "exclude")):
        reply = service.client.post(
            f"{BASE}/respondents/{rid}/review", json={"decision": decision, "note": "n"},
            headers=service.auth(service.analyst),
        )
        assert reply.status_code == 201
    return {"document": document, "rows": rows}


def _expected(service, stored) -> pd.DataFrame:
    """What was stored, read back row by row through the ORM (not the exporter's queries),
    with the scale scores computed from the posted answers."""
    instrument = parse_instrument(stored["document"])
    items = list(instrument.item_ids)
    posted = {row["respondent_id"]: row for row in stored["rows"]}
    results = stored_results(service.database)
    with service.database.read() as session:
        respondents = session.scalars(select(Respondent).order_by(Respondent.id)).all()
        records = []
        for r in respondents:
            record = {
                "respondent_id": r.respondent_id, "received_at": r.received_at,
                "submitted_at": r.submitted_at, "duration_seconds": r.duration_seconds,
                "flag_count": r.flag_count, "verdict": r.verdict.value,
                "careless_score": r.careless_score,
                "review_decision": None if r.review_decision is None else r.review_decision.value,
            }
            for item in items:
                value = posted[r.respondent_id]["answers"].get(item)
                record[item] = np.nan if value is None else value
            for name in REGISTRY:
                state, flagged, score = results.get((r.respondent_id, name), (None, None, None))
                assessed = state == State.ASSESSED
                record[f"{name}_score"] = score if assessed else np.nan
                record[f"{name}_flag"] = float(flagged) if assessed else np.nan
            records.append(record)
    frame = pd.DataFrame(records)
    answers = frame[items].to_numpy(dtype=np.float64)
    matrix = ResponseMatrix.from_arrays(instrument, answers, frame["respondent_id"].to_numpy())
    scales = scale_scores(instrument, matrix)
    return pd.concat([frame, scales], axis=1)


def _read(path, fmt):
    """The file as a frame with the CSV/Parquet column names, and its labels (SPSS, Stata)."""
    if fmt == "csv":
        return pd.read_csv(path, dtype={"respondent_id": str}), None
    if fmt == "parquet":
        return pd.read_parquet(path), None
    reader = pyreadstat.read_sav if fmt == "sav" else pyreadstat.read_dta
    frame, meta = reader(str(path))
    return frame, meta


def _texts(series) -> list:
    return [None if pd.isna(value) else str(value) for value in series]


def _numbers(series) -> np.ndarray:
    return pd.to_numeric(pd.Series(series), errors="coerce").to_numpy(dtype=np.float64)


@pytest.mark.parametrize("fmt", ["csv", "parquet", "sav", "dta"])
def test_export_reads_back_as_stored(service, stored, tmp_path, fmt):
    # The file read back by pandas or pyreadstat (outside readers) must hold what the ORM
    # reads from the database, and the scale scores detectors.scales gives on the posted
    # answers.
    expected = _expected(service, stored)
    path = tmp_path / f"out.{fmt}"
    with service.database.read() as session:
        summary = exports.write_export(session, store.get_survey(session, "pulse"), fmt, path)
    assert summary.respondents == len(expected) == 80 and summary.left_out == 0
    frame, meta = _read(path, fmt)
    # SPSS and Stata names: the one item id that is not a valid name is rewritten by the
    # documented rule ('-' and '.' become '_'); every name is valid and within the limit.
    if meta is not None:
        assert summary.renamed == {EXTRA: "q_09_extra"}
        for name in frame.columns:
            assert re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", name) and len(name) <= NAME_LIMITS[fmt]
        frame = frame.rename(columns={"q_09_extra": EXTRA})
    else:
        assert summary.renamed == {}
    assert frame["respondent_id"].astype(str).tolist() == expected["respondent_id"].tolist()
    columns = ([f"q{i:02d}" for i in range(1, 9)] + [EXTRA] + ["duration_seconds", "flag_count"]
               + [f"{n}_{part}" for n in REGISTRY for part in ("score", "flag")]
               + ["careless_score"] + [c for c in expected.columns if c.startswith("scale_")])
    assert any(c.startswith("scale_s") for c in columns)
    for column in columns:
        tolerance = 1e-6 if fmt == "csv" else 1e-12  # CSV scores carry 6 decimals
        np.testing.assert_allclose(
            _numbers(frame[column]), _numbers(expected[column]), atol=tolerance, rtol=0,
            equal_nan=True, err_msg=f"{fmt}: {column}",
        )
    # Times: SPSS keeps seconds since 1582 in a double (about a microsecond of precision).
    received = pd.to_datetime(frame["received_at"], utc=True)
    stored_times = pd.to_datetime(expected["received_at"], utc=True)
    assert (received - stored_times).abs().max() < pd.Timedelta(milliseconds=1)
    submitted = pd.to_datetime(frame["submitted_at"], utc=True)
    assert abs(submitted.iloc[5] - pd.Timestamp("2027-05-04T07:30:00.25Z")) < pd.Timedelta(
        milliseconds=1)
    assert submitted.drop(index=5).isna().all()
    if meta is None:
        assert frame["verdict"].tolist() == expected["verdict"].tolist()
        assert _texts(frame["review_decision"]) == _texts(expected["review_decision"])
        return
    # Labelled codes: verdict and review decision read through their value labels.
    labels = meta.variable_value_labels
    verdicts = [labels["verdict"][code] for code in frame["verdict"].astype(float)]
    assert verdicts == expected["verdict"].tolist()
    decisions = [None if pd.isna(code) else labels["review_decision"][code]
                 for code in frame["review_decision"].astype(float)]
    assert decisions == _texts(expected["review_decision"])
    assert decisions[2] == "undecided" and decisions[4] == "exclude"  # the latest review
    # Variable labels: item text, detector summaries; value labels: the response formats.
    variable = meta.column_names_to_labels
    assert variable["q01"] == "statement 1"
    assert variable["q_09_extra"] == "How often do you volunteer on weekends?"
    assert labels["q01"] == dict(enumerate(LABELS, start=1))
    assert labels["q_09_extra"] == dict(enumerate(EXTRA_LABELS, start=0))
    for name, detector in REGISTRY.items():
        score, flag = f"{name}_score", f"{name}_flag"
        if len(score) <= NAME_LIMITS[fmt]:
            assert detector.summary[:40] in variable[score]
            assert labels[flag] == {0: "not flagged", 1: "flagged"}
    assert labels["verdict"] == {0: "ok", 1: "review", 2: "likely_careless"}


@pytest.mark.parametrize("fmt", ["sav", "dta"])
def test_whole_numbers_and_measurement_levels(service, stored, tmp_path, fmt):
    # Read back with pyreadstat (an outside reader): answers, flags, codes and counts carry a
    # display format without decimals, so 4 shows as 4 (not 4.00); SPSS files say which
    # columns are ordinal (answers), nominal (codes, flags, ids) and scale (scores, counts).
    # Format syntax: SPSS Fw.d and Stata %w.df are the programs' documented display formats
    # (from memory).
    path = tmp_path / f"out.{fmt}"
    with service.database.read() as session:
        exports.write_export(session, store.get_survey(session, "pulse"), fmt, path)
    _, meta = _read(path, fmt)
    formats = meta.original_variable_types
    whole = "F{}.0" if fmt == "sav" else "%{}.0f"
    assert formats["q01"] == whole.format(1)  # codes 1..5
    assert formats["q_09_extra"] == whole.format(1)  # codes 0..6
    for name in ("straightlining_flag", "verdict", "review_decision"):
        assert formats[name] == whole.format(1), name
    for name in ("flag_count", "version"):
        assert formats[name] == whole.format(8), name
    assert formats["careless_score"] != whole.format(8)  # a score keeps its decimals
    if fmt == "dta":
        return
    levels = meta.variable_measure
    assert levels["q01"] == levels["q_09_extra"] == "ordinal"
    for name in ("respondent_id", "version", "verdict", "review_decision",
                 "straightlining_flag"):
        assert levels[name] == "nominal", name
    for name in ("flag_count", "careless_score", "straightlining_score", "duration_seconds"):
        assert levels[name] == "scale", name
    assert meta.variable_value_labels["q01"] == dict(enumerate(LABELS, start=1))


def test_without_excluded_and_flagged(service, stored, tmp_path):
    expected = _expected(service, stored)
    with service.database.read() as session:
        survey = store.get_survey(session, "pulse")
        summary = exports.write_export(
            session, survey, "parquet", tmp_path / "a.parquet", without=["excluded"]
        )
        kept = pd.read_parquet(tmp_path / "a.parquet")["respondent_id"].tolist()
        # r00004's latest review is exclude; r00002 was excluded, then reviewed 'undecided'.
        assert "r00004" not in kept and "r00002" in kept and len(kept) == 79
        assert summary.left_out == 1 and summary.without == ("excluded",)
        exports.write_export(
            session, survey, "csv", tmp_path / "b.csv", without=["flagged", "excluded"]
        )
        kept = pd.read_csv(tmp_path / "b.csv", dtype={"respondent_id": str})
    unflagged = expected[(expected["flag_count"] == 0) & (expected["respondent_id"] != "r00004")]
    assert 0 < len(unflagged) < len(expected)
    assert kept["respondent_id"].tolist() == unflagged["respondent_id"].tolist()
    with pytest.raises(ValueError, match="without"), service.database.read() as session:
        exports.write_export(
            session, store.get_survey(session, "pulse"), "csv", tmp_path / "c.csv",
            without=["reviewed"],
        )
    assert not (tmp_path / "c.csv").exists()


def test_several_versions_and_clashing_item_ids(service, tmp_path):
    """Items of every version are columns; scales use each respondent's own version; an item
    named like another column is renamed, the other column keeps its name."""
    first = make_document()
    second = make_document()
    second["items"].append({"id": "verdict", "text": "Overall, would you come back?"})
    for document, rows in ((first, random_rows(20, seed=1)),
                           (second, random_rows(20, seed=2, prefix="s"))):
        assert service.client.post(
            "/v1/surveys", json=document, headers=service.auth(service.admin)
        ).status_code == 201
        if document is second:
            for row in rows:
                row["answers"]["verdict"] = 2
        reply = service.client.post(
            f"{BASE}/responses", json={"responses": rows}, headers=service.auth(service.ingest)
        )
        assert reply.status_code == 201, reply.text
    with service.database.read() as session:
        summary = exports.write_export(
            session, store.get_survey(session, "pulse"), "parquet", tmp_path / "v.parquet"
        )
    frame = pd.read_parquet(tmp_path / "v.parquet")
    assert summary.renamed == {"verdict": "verdict_2"}
    assert frame["version"].tolist() == [1] * 20 + [2] * 20
    assert frame["verdict_2"].isna().sum() == 20 and (frame["verdict_2"].iloc[20:] == 2).all()
    assert set(frame["verdict"]) <= {"ok", "review", "likely_careless"}
    # The scale score of a version-1 respondent uses version 1's items (checked by hand for
    # one respondent: mean of the eight answers after reversing the -1-keyed ones, 6 - x).
    row = frame.iloc[0]
    answers = [row[f"q{i:02d}"] for i in range(1, 9)]
    keyed = [x if i % 2 == 0 else 6 - x for i, x in enumerate(answers) if not pd.isna(x)]
    assert row["scale_s"] == pytest.approx(np.mean(keyed))


def test_statistical_names_rule():
    # Cases worked by hand from the rule in service/stat_files.py; the length limits (Stata 32,
    # SPSS 64) are the programs' documented limits (from memory), and pyreadstat refuses
    # longer names (checked while writing this module).
    names = ["respondent_id", "q-01", "1st", "_x", "with", "BY", "str80", "Q_01", "a" * 40,
             "a" * 33]
    assert statistical_names(names, "dta") == [
        "respondent_id", "q_01", "v1st", "v_x", "with_", "BY_", "str80_", "Q_01_2", "a" * 32,
        "a" * 30 + "_2",
    ]
    assert statistical_names(names, "sav")[-2:] == ["a" * 40, "a" * 33]
    assert statistical_names(["a.b", "a-b", "a_b"], "sav") == ["a_b", "a_b_2", "a_b_3"]


def test_cli_lists_and_api_literals_match_the_export_module():
    assert file_commands.EXPORT_FORMATS == exports.EXPORT_FORMATS
    assert file_commands.WITHOUT_CHOICES == exports.WITHOUT_CHOICES
    assert get_args(export_api.ExportFormat) == exports.EXPORT_FORMATS
    assert get_args(export_api.Without) == exports.WITHOUT_CHOICES
    assert set(exports.MEDIA_TYPES) == set(exports.SUFFIXES) == set(exports.EXPORT_FORMATS)


# The endpoint -----------------------------------------------------------------------------------


def test_endpoint_returns_the_file(service, stored, tmp_path):
    reply = service.client.get(
        f"{BASE}/export", params={"format": "parquet"}, headers=service.auth(service.analyst)
    )
    assert reply.status_code == 200, reply.text
    assert reply.headers["content-type"] == "application/vnd.apache.parquet"
    assert reply.headers["content-disposition"] == 'attachment; filename="pulse.parquet"'
    from_api = pd.read_parquet(io.BytesIO(reply.content))
    with service.database.read() as session:
        exports.write_export(
            session, store.get_survey(session, "pulse"), "parquet", tmp_path / "p.parquet"
        )
    pd.testing.assert_frame_equal(from_api, pd.read_parquet(tmp_path / "p.parquet"))

    reply = service.client.get(
        f"{BASE}/export", params={"format": "sav", "without": "excluded"},
        headers=service.auth(service.admin),
    )
    assert reply.status_code == 200 and reply.headers["content-type"] == "application/x-spss-sav"
    (tmp_path / "api.sav").write_bytes(reply.content)
    frame, _ = pyreadstat.read_sav(str(tmp_path / "api.sav"))
    assert len(frame) == 79 and "r00004" not in set(frame["respondent_id"])

    reply = service.client.get(f"{BASE}/export", headers=service.auth(service.analyst))
    assert reply.status_code == 200 and reply.headers["content-type"].startswith("text/csv")
    assert reply.text.splitlines()[0].startswith("respondent_id,version,received_at")


def test_endpoint_auth_and_problems(service, stored):
    assert service.client.get(f"{BASE}/export").status_code == 401
    reply = service.client.get(f"{BASE}/export", headers=service.auth(service.ingest))
    assert reply.status_code == 403
    assert reply.headers["content-type"] == "application/problem+json"
    reply = service.client.get(
        f"{BASE}/export", params={"format": "xlsx"}, headers=service.auth(service.analyst)
    )
    assert reply.status_code == 422
    assert reply.headers["content-type"] == "application/problem+json"
    assert [e["pointer"] for e in reply.json()["errors"]] == ["query:format"]
    reply = service.client.get(
        f"{BASE}/export", params={"without": "reviewed"}, headers=service.auth(service.analyst)
    )
    assert reply.status_code == 422 and reply.json()["errors"][0]["pointer"].startswith(
        "query:without")
    reply = service.client.get(
        "/v1/surveys/nope/export", headers=service.auth(service.analyst)
    )
    assert reply.status_code == 404 and reply.json()["type"] == "/problems/unknown-survey"


# The command ------------------------------------------------------------------------------------


def test_export_command(service, stored, settings, tmp_path, capsys):
    url = settings.database_url
    out = tmp_path / "pulse.dta"
    assert main(["export", "--survey", "pulse", "--out", str(out), "--without", "excluded",
                 "--database", url]) == 0
    printed = capsys.readouterr().out
    assert "79 respondent(s)" in printed and "Left out 1" in printed
    assert "'q-09.extra' written as 'q_09_extra'" in printed
    assert "not a verdict" in printed
    frame, meta = pyreadstat.read_dta(str(out))
    assert len(frame) == 79 and meta.column_names_to_labels["q01"] == "statement 1"

    assert main(["export", "--survey", "pulse", "--out", str(tmp_path / "f.csv"),
                 "--without", "flagged", "--database", url]) == 0
    assert "evidence alone" in capsys.readouterr().out
    assert main(["export", "--survey", "nope", "--out", str(tmp_path / "x.csv"),
                 "--database", url]) == 2
    assert "no survey 'nope'" in capsys.readouterr().err
    assert main(["export", "--survey", "pulse", "--out", str(tmp_path / "x.xlsx"),
                 "--database", url]) == 2
    assert "--format" in capsys.readouterr().err
    assert not (tmp_path / "x.xlsx").exists()


def test_empty_survey_and_results_of_retired_detectors(service, stored, tmp_path):
    """A survey without respondents exports the header only; stored results of a detector no
    longer in the registry are counted, not exported."""
    assert service.client.post(
        "/v1/surveys", json=make_document(survey="empty"), headers=service.auth(service.admin)
    ).status_code == 201
    with service.database.write() as session:
        code = outcomes.detector_codes(session, ["retired_index"]).by_name["retired_index"]
        retired = np.array([(code, 0, 0.5)], dtype=outcomes.PACKED).tobytes()
        for found in session.scalars(select(Respondent).order_by(Respondent.id).limit(3)):
            found.results = found.results + retired
    with service.database.read() as session:
        for fmt in exports.EXPORT_FORMATS:
            summary = exports.write_export(
                session, store.get_survey(session, "empty"), fmt, tmp_path / f"e.{fmt}"
            )
            frame, _ = _read(tmp_path / f"e.{fmt}", fmt)
            assert summary.respondents == 0 and len(frame) == 0
            assert "q01" in frame.columns and "flag_count" in frame.columns
        summary = exports.write_export(
            session, store.get_survey(session, "pulse"), "csv", tmp_path / "r.csv"
        )
    assert summary.unregistered_results == 3
    assert not any(c.startswith("retired_index") for c in pd.read_csv(tmp_path / "r.csv").columns)


@pytest.mark.parametrize("fmt", ["parquet", "sav"])
def test_small_chunks_give_the_same_file_contents(service, stored, tmp_path, fmt):
    with service.database.read() as session:
        survey = store.get_survey(session, "pulse")
        exports.write_export(session, survey, fmt, tmp_path / f"one.{fmt}")
        exports.write_export(session, survey, fmt, tmp_path / f"many.{fmt}", chunk_size=7,
                             without=["excluded"])
    one, _ = _read(tmp_path / f"one.{fmt}", fmt)
    many, _ = _read(tmp_path / f"many.{fmt}", fmt)
    one = one[one["respondent_id"] != "r00004"].reset_index(drop=True)
    pd.testing.assert_frame_equal(one, many)


#: Cells a spreadsheet program would take for a formula (CSV injection; common practice, no
#: source), and look-alikes it would not.
RISKY_IDS = ['=HYPERLINK("http://127.0.0.1/x","y")', "+1+2", "@SUM(A1)", "-1", "=1"]
PLAIN_IDS = ["a-1", "b=2", "'c"]


def test_text_cells_that_start_a_formula_are_quoted_in_every_csv(service, survey, tmp_path):
    rows = [
        {"respondent_id": rid, "answers": {"q01": 1 + i % 5, "q02": 5 - i % 5}}
        for i, rid in enumerate(RISKY_IDS + PLAIN_IDS)
    ]
    reply = service.client.post(
        f"{BASE}/responses", json={"responses": rows}, headers=service.auth(service.ingest)
    )
    assert reply.status_code == 201, reply.text
    expected = {f"'{rid}" for rid in RISKY_IDS} | set(PLAIN_IDS)
    export = service.client.get(f"{BASE}/export", headers=service.auth(service.analyst))
    listing = service.client.get(
        f"{BASE}/respondents", headers={**service.auth(service.analyst), "Accept": "text/csv"}
    )
    for reply in (export, listing):
        assert reply.status_code == 200, reply.text
        cells = list(csv.DictReader(io.StringIO(reply.text)))
        assert {cell["respondent_id"] for cell in cells} == expected
    frame = pd.DataFrame(
        {"respondent_id": RISKY_IDS + ["\tx", "\rx"] + PLAIN_IDS, "score": -1.5}
    )
    write_csv(frame, tmp_path / "s.csv")
    read = pd.read_csv(tmp_path / "s.csv", dtype={"respondent_id": str}, keep_default_na=False)
    assert read["respondent_id"].tolist() == [
        formula_safe(rid) for rid in frame["respondent_id"]
    ] == [f"'{rid}" for rid in RISKY_IDS + ["\tx", "\rx"]] + PLAIN_IDS
    assert (read["score"] == -1.5).all()  # numbers are never quoted


@pytest.mark.parametrize("without", [(), ("excluded",), ("flagged",)])
def test_an_export_from_a_shared_read_equals_one_read_on_its_own(service, stored, without):
    with service.database.read() as session:
        survey = store.get_survey(session, "pulse")
        alone, _ = exports.export_frame(session, survey, without=without)
        shared = survey_data.read_survey(session, survey, chunk=9)
        together, _ = exports.export_frame(session, survey, without=without, stored=shared)
    assert len(alone) == len(together) > 0
    pd.testing.assert_frame_equal(alone, together)


@pytest.mark.parametrize("fmt", ["sav", "dta"])
def test_the_polars_frame_gives_the_file_pyreadstat_writes_from_pandas(
    service, stored, tmp_path, fmt, monkeypatch
):
    """The writer's fast input (a polars frame) against pyreadstat's own pandas path: both
    files read back to the same values, variable types, formats, labels and value labels."""
    from service import stat_files

    with service.database.read() as session:
        survey = store.get_survey(session, "pulse")
        exports.write_export(session, survey, fmt, tmp_path / f"fast.{fmt}")
        monkeypatch.setattr(stat_files, "for_writer", lambda frame: frame)
        exports.write_export(session, survey, fmt, tmp_path / f"plain.{fmt}")
    fast, fast_meta = _read(tmp_path / f"fast.{fmt}", fmt)
    plain, plain_meta = _read(tmp_path / f"plain.{fmt}", fmt)
    pd.testing.assert_frame_equal(fast, plain)
    for attribute in ("original_variable_types", "readstat_variable_types", "column_names_to_labels",
                      "variable_value_labels", "variable_measure", "file_label"):
        assert getattr(fast_meta, attribute) == getattr(plain_meta, attribute), attribute
    assert fast.isna().to_numpy().any()  # missing values were written (as missing)
