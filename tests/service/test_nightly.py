"""The nightly job: stale results, chunked and interruptible re-screening, files, failures."""

from __future__ import annotations

import datetime as dt
import io
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import select, text

from detectors import REGISTRY
from service import ingest, nightly, outcomes, rescreen, store
from service.cli import main
from service.database import Database
from service.db import make_engine, upgrade
from service.models import Respondent
from service.screeners import screener_for
from service.settings import Settings
from service.stat_files import read_labelled

from .conftest import make_document, random_rows, respondent, stored_results

DAY = dt.date(2027, 5, 4)
#: Columns that hold the time of a run: equal states are compared without them.
TIMES = {"screened_at", "replaced_at", "created_at", "received_at"}


def _database(url: str) -> Database:
    engine = make_engine(url)
    upgrade(engine)
    return Database(engine)


def _register(database: Database, document: dict) -> None:
    with database.write() as session:
        store.register_version(session, document, document.get("title", ""))


def _ingest(database: Database, settings: Settings, survey: str, rows: list[dict]) -> None:
    with database.write() as session:
        ingest.ingest(session, store.get_survey(session, survey), rows, ingest.IngestOptions(),
                    settings)


def _state(database: Database, times: bool = True) -> dict[str, list[tuple]]:
    """Every row of the screening tables, ordered by key (time columns left out if asked)."""
    tables = {
        "respondents": "id",
        "screening_history": "id",
        "reference_samples": "id",
        "surveys": "id",
    }
    out = {}
    with database.engine.connect() as connection:
        for table, order in tables.items():
            result = connection.execute(text(f"SELECT * FROM {table} ORDER BY {order}"))
            keep = [i for i, c in enumerate(result.keys()) if times or c not in TIMES]
            out[table] = [tuple(row[i] for i in keep) for row in result]
    return out


@pytest.fixture
def two_surveys(database_url):
    """A database with two surveys: 'pulse' (8 items, 150 respondents) and 'other' (10
    items, 90 respondents), screened on arrival without a reference sample."""
    settings = Settings(database_url=database_url, reference_min_respondents=50)
    database = _database(database_url)
    _register(database, make_document(survey="pulse"))
    _register(database, make_document(n_items=10, survey="other"))
    _ingest(database, settings, "pulse", random_rows(150, seed=1))
    _ingest(database, settings, "other", random_rows(90, n_items=10, seed=2, prefix="o"))
    yield database, settings
    database.dispose()


def _run(database, settings, out, **options):
    options.setdefault("day", DAY)
    return {r.survey: r for r in nightly.run_nightly(database, settings, out, **options)}


def test_nightly_rescreens_stale_results_and_writes_files(two_surveys, tmp_path):
    database, settings = two_surveys
    runs = _run(database, settings, tmp_path)
    assert set(runs) == {"pulse", "other"}
    for name, n in (("pulse", 150), ("other", 90)):
        run = runs[name]
        assert not run.failed, run.error
        assert run.respondents == n and run.stale == n and run.counts.rescreened == n
        assert len(run.references) == 1 and run.references[0]["respondents"] == n
        folder = tmp_path / DAY.isoformat() / name
        assert sorted(p.name for p in folder.iterdir()) == sorted(
            [f"{name}.sav", "nightly.json", "report.html"]
        )
        table = read_labelled(folder / f"{name}.sav")
        assert len(table.frame) == n
        assert json.loads((folder / "nightly.json").read_text())["rescreened"] == n
        assert name in run.line() and f"{n:,} re-screened" in run.line()
    with database.read() as session:
        for name in ("pulse", "other"):
            survey = store.get_survey(session, name)
            reference = store.latest_reference(session, survey.current_version_id)
            assert survey.current_reference_id == reference.id
            screener = screener_for(session, survey.current_version_id)
            assert store.count_stale(
                session, survey.id, [survey.current_version_id], survey.current_version_id,
                reference.id, screener.fingerprint,
            ) == 0
    # Every result was judged against the new reference: mahalanobis is assessed now.
    states = {
        state for (_, name), (state, _, _) in stored_results(database).items()
        if name == "mahalanobis"
    }
    assert states == {0}


def test_a_second_run_changes_nothing(two_surveys, tmp_path):
    database, settings = two_surveys
    _run(database, settings, tmp_path / "first")
    before = _state(database)
    runs = _run(database, settings, tmp_path / "second")
    assert _state(database) == before  # not even a screening time moved
    for run in runs.values():
        assert run.stale == 0 and run.counts.rescreened == 0 and run.references == []
        assert (run.files[0]).exists()


def test_new_arrivals_refresh_the_reference_and_only_results_that_can_change(
    two_surveys, tmp_path
):
    database, settings = two_surveys
    _run(database, settings, tmp_path)
    _ingest(database, settings, "pulse", random_rows(10, seed=9, prefix="late"))
    runs = _run(database, settings, tmp_path)
    pulse = runs["pulse"]
    assert pulse.references and pulse.references[0]["respondents"] == 160
    assert pulse.stale == 160 and pulse.counts.rescreened == 160
    # The reference-based detector is rewritten for everyone; the others only where a result
    # came out different (here: nowhere for the 150, whose answers and screener are unchanged).
    sample = [name for name, cls in REGISTRY.items() if cls.needs_sample]
    assert pulse.counts.results_written < 160 * len(REGISTRY)
    assert pulse.counts.results_written >= 160 * len(sample)
    assert runs["other"].stale == 0 and runs["other"].references == []


def test_a_few_arrivals_keep_the_reference_and_nobody_is_stale(two_surveys, tmp_path):
    database, settings = two_surveys
    _run(database, settings, tmp_path)
    # 3 more of 150 is 2%, under REFERENCE_REFRESH_SHARE: the new ones were screened against
    # the current reference on arrival.
    _ingest(database, settings, "pulse", random_rows(3, seed=9, prefix="late"))
    runs = _run(database, settings, tmp_path)
    assert runs["pulse"].references == [] and runs["pulse"].stale == 0


def test_a_new_detector_version_makes_every_result_stale(two_surveys, tmp_path, monkeypatch):
    database, settings = two_surveys
    _run(database, settings, tmp_path)
    monkeypatch.setattr(REGISTRY["long_string"], "version", "999")
    database.memo.clear()  # screeners built afresh, as by a process running the new code
    runs = _run(database, settings, tmp_path)
    assert runs["pulse"].stale == 150 and runs["other"].stale == 90
    assert runs["pulse"].references == []  # the respondents did not change
    with database.read() as session:
        versions = set()
        for name in ("pulse", "other"):
            survey = store.get_survey(session, name)
            fingerprint = screener_for(session, survey.current_version_id).fingerprint
            for found in session.scalars(select(Respondent).where(
                Respondent.survey_id == survey.id
            )):
                assert found.screened_with == fingerprint
                versions |= {
                    r.detector_version for r in outcomes.results_of(session, found)
                    if r.detector == "long_string"
                }
    assert versions == {"999"}


def test_respondents_move_to_a_new_version_their_answers_fit(two_surveys, tmp_path):
    database, settings = two_surveys
    _run(database, settings, tmp_path)
    # Same items, a different cut-off: the old respondents' results are stale.
    _register(database, make_document(survey="pulse", screening={"long_string": {"run_cutoff": 3}}))
    # More items: answers of 'other' do not fit; its respondents stay on version 1.
    _register(database, make_document(n_items=12, survey="other"))
    runs = _run(database, settings, tmp_path)
    assert runs["pulse"].stale == 150 and runs["other"].stale == 0
    with database.read() as session:
        numbers = {
            name: session.execute(
                text("SELECT DISTINCT v.number FROM respondents r JOIN survey_versions v "
                     "ON v.id = r.survey_version_id JOIN surveys s ON s.id = r.survey_id "
                     "WHERE s.survey = :name"),
                {"name": name},
            ).scalars().all()
            for name in ("pulse", "other")
        }
    flagged = sum(
        is_flagged for (_, name), (_, is_flagged, _) in stored_results(database).items()
        if name == "long_string"
    )
    assert numbers == {"pulse": [2], "other": [1]}
    assert flagged > 0  # runs of 3 are common in random answers


def test_an_interrupted_run_finishes_on_the_next_one(tmp_path, monkeypatch):
    # SQLite files, so the same starting state can be copied.
    first = tmp_path / "a.db"
    settings = Settings(database_url=f"sqlite:///{first}", reference_min_respondents=50)
    database = _database(settings.database_url)
    _register(database, make_document(survey="pulse"))
    _ingest(database, settings, "pulse", random_rows(150, seed=4))
    database.dispose()
    second = tmp_path / "b.db"
    shutil.copyfile(first, second)

    whole = _database(f"sqlite:///{first}")
    _run(whole, settings, tmp_path / "whole", chunk=40)
    expected = _state(whole, times=False)
    whole.dispose()

    broken = _database(f"sqlite:///{second}")
    chunks = []

    def stop_after_first(survey, done, total):
        chunks.append(done)
        raise KeyboardInterrupt

    monkeypatch.setattr(nightly, "_after_chunk", stop_after_first)
    with pytest.raises(KeyboardInterrupt):
        _run(broken, settings, tmp_path / "broken", chunk=40)
    assert chunks == [40]
    with broken.read() as session:
        survey = store.get_survey(session, "pulse")
        screener = screener_for(session, survey.current_version_id)
        left = store.count_stale(
            session, survey.id, [survey.current_version_id], survey.current_version_id,
            survey.current_reference_id, screener.fingerprint,
        )
    assert left == 110  # the first chunk is committed, the rest still stale

    monkeypatch.setattr(nightly, "_after_chunk", lambda survey, done, total: None)
    runs = _run(broken, settings, tmp_path / "broken", chunk=40)
    assert runs["pulse"].stale == 110 and runs["pulse"].references == []
    assert _state(broken, times=False) == expected
    broken.dispose()


def test_a_failing_survey_exits_non_zero_while_the_others_complete(two_surveys, database_url,
                                                                   tmp_path, capsys):
    database, _ = two_surveys
    with database.write() as session:
        session.execute(
            text("UPDATE survey_versions SET document = :doc WHERE survey_id = "
                 "(SELECT id FROM surveys WHERE survey = 'other')"),
            {"doc": json.dumps({"survey": "other", "response_format": {"points": 5},
                                "items": []})},
        )
    code = main(["nightly", "--out", str(tmp_path), "--database", database_url])
    captured = capsys.readouterr()
    assert code == 1
    assert "other: FAILED:" in captured.err and "items" in captured.err
    assert "1 of 2 survey(s) failed" in captured.err
    assert "pulse: 150 respondents, 150 stale, 150 re-screened" in captured.out
    day = dt.date.today().isoformat()
    assert (tmp_path / day / "pulse" / "pulse.sav").exists()
    assert not (tmp_path / day / "other").exists()


def test_an_unknown_survey_is_reported(two_surveys, tmp_path):
    database, settings = two_surveys
    runs = _run(database, settings, tmp_path, surveys=["pulse", "nope"])
    assert runs["nope"].failed and "no survey 'nope'" in runs["nope"].error
    assert not runs["pulse"].failed


def test_cli_options_choose_surveys_and_format(two_surveys, database_url, tmp_path, capsys,
                                               monkeypatch):
    monkeypatch.setenv("HEEDFUL_REFERENCE_MIN_RESPONDENTS", "50")
    code = main(["nightly", "--out", str(tmp_path), "--survey", "other", "--format", "csv",
                 "--without", "none", "--database", database_url])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "other:" in captured.out and "pulse" not in captured.out
    day = dt.date.today().isoformat()
    exported = (tmp_path / day / "other" / "other.csv").read_text().splitlines()
    assert len(exported) == 91  # header and 90 respondents
    # Without a terminal, progress comes as plain log lines on standard error.
    assert "other: re-screening version 1: 90 of 90" in captured.err


def test_progress_bar_in_a_terminal():
    stream = io.StringIO()
    progress = nightly.Progress(stream, interactive=True)
    progress.start("pulse: re-screening", 200)
    progress.update(200)
    progress.finish()
    shown = stream.getvalue()
    assert "\r" in shown and "#" * nightly.Progress.WIDTH in shown and "200/200" in shown


def test_a_respondent_replaced_during_the_run_is_left_alone(two_surveys, tmp_path):
    database, settings = two_surveys
    with database.read() as session:
        survey = store.get_survey(session, "pulse")
        [target] = rescreen.screening_targets(session, survey)
        stored = rescreen.read_stored(session, survey.id, target)
    new = random_rows(1, seed=77, prefix="r")[0]  # same id as the first, other answers
    with database.write() as session:
        ingest.ingest(session, store.get_survey(session, "pulse"), [new],
                    ingest.IngestOptions(replace=True), settings)
    with database.write() as session:
        count = rescreen.rescreen_rows(
            session, target.screener, stored, np.arange(len(stored)), None, None,
            dt.datetime.now(dt.UTC),
        )
    assert count.skipped == 1 and count.rescreened == 149


def test_stored_matrix_matches_the_posted_answers(two_surveys):
    # The vectorised reader against the posted rows themselves.
    database, _ = two_surveys
    rows = random_rows(150, seed=1)
    with database.read() as session:
        survey = store.get_survey(session, "pulse")
        [target] = rescreen.screening_targets(session, survey)
        stored = rescreen.read_stored(session, survey.id, target, chunk=33)
    items = [f"q{i + 1:02d}" for i in range(8)]
    expected = np.array(
        [[-128 if r["answers"][q] is None else r["answers"][q] for q in items] for r in rows]
    )
    np.testing.assert_array_equal(stored.matrix.answers, expected)
    assert stored.matrix.respondent_ids.tolist() == [r["respondent_id"] for r in rows]


def test_files_go_to_a_dated_folder(two_surveys, tmp_path):
    database, settings = two_surveys
    runs = _run(database, settings, tmp_path, surveys=["pulse"], fmt="parquet")
    assert runs["pulse"].files[0] == Path(tmp_path, "2027-05-04", "pulse", "pulse.parquet")


def test_summary_and_stored_results_agree_when_a_detector_sees_more_in_a_chunk(
    two_surveys, tmp_path
):
    # Posted one at a time, two identical records cannot be seen as duplicates on arrival;
    # screened together in a nightly chunk they are. The respondent is then rewritten whole,
    # so the stored result agrees with the flags on the respondent.
    database, settings = two_surveys
    _run(database, settings, tmp_path)
    same = [1, 2, 4, 5, 2, 1, 3, 4, 5, 2]
    for rid in ("twin-a", "twin-b"):
        _ingest(database, settings, "other", [respondent(rid, same)])
    # With 3 more, 5 of 90 arrived: a new reference sample, everyone stale against it.
    _ingest(database, settings, "other", random_rows(3, n_items=10, seed=11, prefix="m"))
    runs = _run(database, settings, tmp_path)
    assert runs["other"].references and runs["other"].stale == 95
    results = stored_results(database)
    with database.read() as session:
        codes = outcomes.detector_codes(session)
        other = store.get_survey(session, "other")
        rows = [
            (codes.names(found.flag_bits), results[(rid, "duplicate_answers")][1])
            for rid in ("twin-a", "twin-b")
            if (found := store.get_respondent(session, other.id, rid)) is not None
        ]
    assert len(rows) == 2
    for flags, flagged in rows:
        assert ("duplicate_answers" in flags) == bool(flagged)
    assert all(flagged for _, flagged in rows)


def test_ctrl_c_exits_130_and_says_the_next_run_finishes(two_surveys, database_url, tmp_path,
                                                          capsys, monkeypatch):
    monkeypatch.setenv("HEEDFUL_REFERENCE_MIN_RESPONDENTS", "50")

    def interrupt(survey, done, total):
        raise KeyboardInterrupt

    monkeypatch.setattr(nightly, "_after_chunk", interrupt)
    code = main(["nightly", "--out", str(tmp_path), "--database", database_url])
    assert code == 130
    assert "next run finishes the rest" in capsys.readouterr().err


def _fresh_rows(database: Database, survey: str) -> dict[int, tuple]:
    """Each respondent's screening columns as a fresh screening of every stored respondent of
    the survey, in one matrix against the survey's current reference, would store them."""
    with database.read() as session:
        found = store.get_survey(session, survey)
        [target] = rescreen.screening_targets(session, found)
        stored = rescreen.read_stored(session, found.id, target)
        reference = store.reference_of(session, found.current_reference_id)
        screened = outcomes.screen_matrix(target.screener, stored.matrix, reference.data)
        codes = outcomes.detector_codes(session)
        return {
            int(pk): (
                w.summary.flag_count, codes.bits(w.summary.flags), w.summary.verdict.value,
                w.summary.careless_score, w.results,
                None if w.kept_evidence is None else json.loads(store.json_text(w.kept_evidence)),
                found.current_reference_id,
            )
            for pk, w in zip(stored.pks.tolist(), outcomes.written(screened, codes), strict=True)
        }


def _stored_rows(database: Database) -> dict[int, tuple]:
    with database.read() as session:
        rows = session.execute(
            select(Respondent.id, Respondent.flag_count, Respondent.flag_bits, Respondent.verdict,
                   Respondent.careless_score, Respondent.results, Respondent.kept_evidence,
                   Respondent.reference_id)
        ).all()
    return {row[0]: (row[1], row[2], row[3].value, *row[4:]) for row in rows}


def test_a_bulk_rescreen_stores_what_a_fresh_screening_computes(database_url, tmp_path):
    """Nulls, left-out items, straight lines (copies of each other, whose evidence is kept)
    and fast respondents, posted in one batch and screened on arrival without a reference
    sample; then the nightly job (only the reference-based results rewritten) and a full
    re-screen (every result rewritten) store exactly what screening all of them at once
    against the reference gives."""
    settings = Settings(database_url=database_url, reference_min_respondents=50)
    database = _database(database_url)
    _register(database, make_document(survey="pulse"))
    rows = random_rows(160, seed=8)
    rng = np.random.default_rng(8)
    for k, row in enumerate(rows):
        row["duration_seconds"] = float(rng.uniform(20, 600)) if k % 4 else 15.0
        if k % 9 == 4:
            del row["answers"]["q03"], row["answers"]["q07"]  # items left out
    _ingest(database, settings, "pulse", rows)
    kept_before = sum(r[5] is not None for r in _stored_rows(database).values())
    assert kept_before > 0  # the straight lines are copies of each other

    run = _run(database, settings, tmp_path)["pulse"]
    assert run.stale == 160 and run.counts.rescreened == 160 and run.references
    assert _stored_rows(database) == _fresh_rows(database, "pulse")

    with database.write() as session:
        rescreen.rescreen(session, store.get_survey(session, "pulse"), settings)
    assert _stored_rows(database) == _fresh_rows(database, "pulse")
    database.dispose()
