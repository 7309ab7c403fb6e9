"""Storage details: SQLite pragmas, migrations on both backends, cascading erasure."""

from __future__ import annotations

import pytest
from sqlalchemy import inspect, text

from service.db import current_revision, head_revision, make_engine, upgrade
from service.models import Base


def test_migrations_create_every_table(database_url):
    engine = make_engine(database_url)
    upgrade(engine)
    upgrade(engine)  # a second run is a no-op
    assert current_revision(engine) == head_revision()
    tables = set(inspect(engine).get_table_names())
    assert set(Base.metadata.tables) <= tables
    engine.dispose()


def test_sqlite_runs_in_wal_mode_with_foreign_keys(tmp_path):
    engine = make_engine(f"sqlite:///{tmp_path / 'x.db'}")
    with engine.connect() as connection:
        assert connection.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert connection.execute(text("PRAGMA foreign_keys")).scalar() == 1
    engine.dispose()


def test_unsupported_database_url_fails_at_settings_time():
    from pydantic import ValidationError

    from service.settings import Settings

    with pytest.raises(ValidationError, match="unsupported database URL"):
        Settings(database_url="mysql://root@localhost/x")
    with pytest.raises(ValidationError):
        Settings(port=0)


def test_compact_history_records_read_back_as_the_full_ones():
    """Each earlier result written in the compact layout reads back (state, flag, score,
    version) as the same result in the full 10-byte layout does: scores float32 holds exactly
    (0.25, 3.0), scores it does not (0.1, 1e300), no score (NaN, infinity), detectors that
    gave no result, versions all equal, different, or unknown."""
    from types import SimpleNamespace

    import numpy as np

    from service import outcomes

    names = ["long_string", "mahalanobis", "straightlining", "even_odd"]
    codes = outcomes.DetectorCodes({"long_string": 3, "mahalanobis": 0, "straightlining": 9,
                                    "even_odd": 62})
    scores = np.array([[0.25, 0.1, np.nan, 1e300],
                       [3.0, np.inf, -2.5, 0.0],
                       [np.nan, np.nan, np.nan, np.nan]])
    columns = outcomes.ResultColumns(
        names=names,
        present=np.array([[True, True, True, True], [True, False, True, True],
                          [False, False, False, False]]),
        states=np.array([[0, 0, 1, 0], [0, -1, 0, 2], [-1, -1, -1, -1]], dtype=np.int8),
        flagged=np.array([[True, False, False, True], [False, False, True, False],
                          [False, False, False, False]]),
        scores=scores, codes=codes,
    )
    rows = np.arange(3)
    for versions, known in ((["1.0"] * 4, [True, True, True]),
                            (["1.0", "2.1", "1.0", "1.3"], [True, False, True])):
        blobs, kept = outcomes.earlier_records(columns, rows, versions, np.array(known))
        for k in range(3):
            present = np.flatnonzero(columns.present[k])
            full = np.zeros(len(present), dtype=outcomes.EARLIER)
            full["code"] = [codes.by_name[names[j]] for j in present]
            full["mark"] = (columns.states[k, present].astype(np.uint8) & 3) | (
                columns.flagged[k, present].astype(np.uint8) * 4
            )
            full["score"] = scores[k, present]
            listed = [versions[j] for j in present]
            full_versions = (listed[0] if len(set(listed)) == 1 else listed) if known[k] else None
            compact = outcomes.earlier_results(
                codes, SimpleNamespace(packed_results=blobs[k], versions=kept[k], results={})
            )
            expected = outcomes.earlier_results(
                codes, SimpleNamespace(packed_results=full.tobytes(), versions=full_versions,
                                       results={})
            )
            assert compact == expected
            assert blobs[k][0] == outcomes.COMPACT and len(blobs[k]) < max(len(full.tobytes()), 10)
        assert outcomes.earlier_records(columns, rows[:0], versions, np.array([], bool)) == ([], [])
