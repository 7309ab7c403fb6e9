"""Migrations move existing data: a database written at an earlier revision reads back the
same results after ``upgrade``."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import sqlalchemy as sa
from sqlalchemy.orm import Session

from detectors import MISSING, REGISTRY, ResponseMatrix, State, build_detectors, parse_instrument
from service import outcomes, store
from service.answers import answers_of
from service.database import Database
from service.db import UTCDateTime, _alembic_config, make_engine, upgrade, writer
from service.ingest import answers_digest
from service.models import Survey, SurveyVersion
from service.screeners import Screener, screener_for

from .conftest import make_document, random_rows, same_evidence

NOW = dt.datetime(2027, 5, 4, 12, 0, tzinfo=dt.UTC)

# The two tables as they were at revision 0004 (only the columns written here).
_OLD = sa.MetaData()
_RESPONDENTS = sa.Table(
    "respondents", _OLD,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("survey_id", sa.Integer), sa.Column("respondent_id", sa.String),
    sa.Column("survey_version_id", sa.Integer), sa.Column("answers", sa.JSON),
    sa.Column("answers_digest", sa.String), sa.Column("duration_seconds", sa.Float),
    sa.Column("received_at", UTCDateTime()), sa.Column("screened_at", UTCDateTime()),
    sa.Column("flag_count", sa.SmallInteger), sa.Column("flags", sa.String),
    sa.Column("verdict", sa.String), sa.Column("careless_score", sa.Float),
    sa.Column("screened_with", sa.String),
)
_OUTCOMES = sa.Table(
    "detector_outcomes", _OLD,
    sa.Column("respondent_pk", sa.Integer), sa.Column("detector", sa.String),
    sa.Column("detector_version", sa.String), sa.Column("state", sa.SmallInteger),
    sa.Column("score", sa.Float), sa.Column("cutoff", sa.Float),
    sa.Column("flagged", sa.Boolean), sa.Column("reason", sa.Text),
    sa.Column("evidence", sa.JSON), sa.Column("sentence", sa.Text),
    sa.Column("reference_id", sa.Integer),
)
_HISTORY = sa.Table(
    "screening_history", _OLD,
    sa.Column("respondent_pk", sa.Integer), sa.Column("survey_version_id", sa.Integer),
    sa.Column("screened_at", UTCDateTime()), sa.Column("replaced_at", UTCDateTime()),
    sa.Column("flag_count", sa.SmallInteger), sa.Column("flags", sa.String),
    sa.Column("verdict", sa.String), sa.Column("careless_score", sa.Float),
    sa.Column("results", sa.JSON),
)


def _upgrade_to(engine: sa.Engine, revision: str) -> None:
    from alembic import command

    config = _alembic_config(engine.url.render_as_string(hide_password=False))
    with writer(engine).begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, revision)


def _old_database(engine: sa.Engine) -> tuple[list[dict], outcomes.Screened]:
    """Write a survey and 40 screened respondents the way revision 0004 stored them."""
    document = parse_instrument(make_document(n_items=12)).model_dump(mode="json")
    rows = random_rows(40, n_items=12, seed=8)
    for i, row in enumerate(rows):
        row["duration_seconds"] = 20.0 + 9 * i
    rows[5]["answers"] = dict(rows[6]["answers"])  # a copy
    del rows[7]["answers"]["q03"]  # an item left out
    instrument = parse_instrument(document)
    detectors = build_detectors(instrument)
    digest = store.canonical_digest(document)
    with Session(writer(engine)) as session, session.begin():
        survey = Survey(survey="pulse", title="", webhook_secret="whsec_x", erasure_salt="00")
        session.add(survey)
        session.flush()
        version = SurveyVersion(survey_id=survey.id, number=1, document=document, digest=digest)
        session.add(version)
        session.flush()
        survey.current_version_id = version.id
        screener = Screener(
            version.id, 1, instrument, detectors, dict(instrument.item_index),
            "unused here",
        )
        values = np.array(
            [[MISSING if r["answers"].get(item) is None else r["answers"][item]
              for item in instrument.item_ids] for r in rows], dtype=np.int8,
        )
        matrix = ResponseMatrix(
            respondent_ids=np.array([r["respondent_id"] for r in rows], dtype=object),
            answers=values, durations=np.array([r["duration_seconds"] for r in rows]),
        )
        screened = outcomes.screen_matrix(screener, matrix, None)
        old_fingerprint = store.canonical_digest({
            "instrument": digest,
            "detectors": {name: type(d).version for name, d in detectors.items()},
        })
        connection = session.connection()
        for i, row in enumerate(rows):
            summary = screened.summary(i)
            pk = connection.execute(
                _RESPONDENTS.insert().returning(_RESPONDENTS.c.id),
                {
                    "survey_id": survey.id, "respondent_id": row["respondent_id"],
                    "survey_version_id": version.id, "answers": row["answers"],
                    "answers_digest": store.canonical_digest(  # 0004 kept all 256 bits
                        {k: v for k, v in row["answers"].items() if v is not None}
                    ),
                    "duration_seconds": row["duration_seconds"], "received_at": NOW,
                    "screened_at": NOW, "flag_count": summary.flag_count,
                    "flags": ",".join(summary.flags), "verdict": summary.verdict.value,
                    "careless_score": summary.careless_score,
                    "screened_with": old_fingerprint,
                },
            ).scalar_one()
            row["pk"] = pk
            for name in screened.names:
                result = screened.results[name]
                if result is None:
                    continue
                score, cutoff = float(result.scores[i]), float(result.cutoffs[i])
                connection.execute(_OUTCOMES.insert(), {
                    "respondent_pk": pk, "detector": name, "detector_version": result.version,
                    "state": int(result.states[i]),
                    "score": score if np.isfinite(score) else None,
                    "cutoff": cutoff if np.isfinite(cutoff) else None,
                    "flagged": bool(result.flags[i]), "reason": result.reasons[i],
                    "evidence": json.loads(json.dumps(result.evidence_for(i))),
                    "sentence": result.sentence_for(i), "reference_id": None,
                })
        connection.execute(_HISTORY.insert(), {
            "respondent_pk": rows[0]["pk"], "survey_version_id": version.id,
            "screened_at": NOW, "replaced_at": NOW, "flag_count": 0, "flags": "",
            "verdict": "ok", "careless_score": None,
            "results": {"straightlining": {"version": "1", "state": "assessed", "score": 0.25,
                                           "flagged": False}},
        })
    return rows, screened


def test_compact_results_migration_reads_back_the_same_results(database_url):
    engine = make_engine(database_url)
    _upgrade_to(engine, "0004")
    rows, screened = _old_database(engine)
    upgrade(engine)
    database = Database(engine)
    try:
        with database.read() as session:
            codes = outcomes.detector_codes(session)
            # Codes in registry order (a detector added since gets its code when it first runs).
            assert list(codes.by_name) == [name for name in REGISTRY if name in codes.by_name]
            survey = store.get_survey(session, "pulse")
            for i, row in enumerate(rows):
                found = store.get_respondent(session, survey.id, row["respondent_id"])
                summary = outcomes.Summary.stored(
                    codes, found.flag_bits, found.verdict, found.careless_score
                )
                assert summary == screened.summary(i)
                assert answers_of(
                    session, found.survey_version_id, found.answer_codes
                ) == row["answers"]  # as received: left-out items absent, nulls kept
                shown = {r.detector: r for r in outcomes.results_of(session, found)}
                for name in screened.names:
                    result = screened.results[name]
                    if result is None:
                        continue
                    got = shown[name]
                    assert got.state == State(int(result.states[i]))
                    assert got.flagged == bool(result.flags[i])
                    score = float(result.scores[i])
                    assert got.score == (score if np.isfinite(score) else None)
                    expected = json.loads(json.dumps(result.evidence_for(i)))
                    assert same_evidence(got.evidence, expected), (name, i)
                    assert got.sentence == result.sentence_for(i), (name, i)
            # The copy and its original: the count of other respondents came through.
            copy = store.get_respondent(session, survey.id, rows[5]["respondent_id"])
            [dup] = [r for r in outcomes.results_of(session, copy)
                     if r.detector == "duplicate_answers"]
            assert dup.evidence["same_answers_count"] == 1 and dup.flagged
            [history] = store.screening_history_of(session, rows[0]["pk"])
            assert outcomes.earlier_results(codes, history)["straightlining"]["score"] == 0.25
            # Fingerprints and digests as the code computes them now: nothing stale, every
            # respondent recognised as a duplicate of itself.
            fingerprint = screener_for(session, survey.current_version_id).fingerprint
            assert store.count_stale(
                session, survey.id, [survey.current_version_id], survey.current_version_id,
                None, fingerprint,
            ) == 0
            stored_digests = store.existing_respondents(
                session, survey.id, [row["respondent_id"] for row in rows]
            )
            assert all(
                stored_digests[row["respondent_id"]].answers_digest
                == answers_digest(row["answers"]) for row in rows
            )
            # The listing's detector filter reads the new flag bits.
            flagged = {
                r.respondent_id for r in store.list_respondents(
                    session, survey.id, store.ListQuery(detector="duplicate_answers")
                )[0]
            }
            assert flagged == {rows[5]["respondent_id"], rows[6]["respondent_id"]}
    finally:
        database.dispose()
