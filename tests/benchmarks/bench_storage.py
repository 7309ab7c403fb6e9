"""Benchmark: database bytes per stored respondent, on SQLite and PostgreSQL.

Registers a 50-item survey, posts generated respondents through the ingestion use case in
batches, re-screens the survey once (so every sample-based detector has a reference sample and
is assessed), then compacts the database (SQLite ``VACUUM``; PostgreSQL ``VACUUM FULL``) and
prints the bytes per respondent: the database's size minus that of the same database before any
respondent arrived, divided by the respondents. PostgreSQL runs when ``HEEDFUL_TEST_POSTGRES_URL``
is set (a schema of its own, dropped afterwards).

    python tests/benchmarks/bench_storage.py                      # 20,000 x 50
    python tests/benchmarks/bench_storage.py --respondents 5000 --write
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

SURVEY = "bench-storage"
#: Respondents per posted batch.
BATCH = 5_000


def _document(k: int) -> dict:
    from bench_survey import bench_document

    return bench_document(SURVEY, "Storage bench", k)


def _rows(rng: np.random.Generator, first: int, m: int, k: int) -> list[dict]:
    """Respondents answering a trait with noise, 5% answering at random, 2% answers missing."""
    keyed = np.where(np.arange(k) % 2 == 0, 1, -1)
    trait = rng.normal(size=(m, 1))
    answers = np.clip(np.rint(3 + keyed * trait + rng.normal(0, 0.8, (m, k))), 1, 5)
    careless = rng.random(m) < 0.05
    answers[careless] = rng.integers(1, 6, size=(int(careless.sum()), k))
    missing = rng.random((m, k)) < 0.02
    items = [f"q{j + 1:02d}" for j in range(k)]
    return [
        {
            "respondent_id": f"r{first + i:07d}",
            "answers": {
                item: (None if missing[i, j] else int(answers[i, j]))
                for j, item in enumerate(items)
            },
            "duration_seconds": float(rng.uniform(120, 900)),
        }
        for i in range(m)
    ]


def _size(database) -> int:
    """Bytes the database takes after compaction."""
    engine = database.engine
    if engine.dialect.name == "sqlite":
        with engine.connect() as connection:
            connection.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
        raw = engine.raw_connection()
        try:
            raw.driver_connection.isolation_level = None
            raw.driver_connection.execute("VACUUM")
        finally:
            raw.close()
        path = Path(engine.url.database)
        return path.stat().st_size
    with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as connection:
        # only this run's own tables: a database-wide VACUUM FULL locks other schemas too
        # (a test dropping its schema at the same time deadlocked with it)
        tables = connection.exec_driver_sql(
            "SELECT quote_ident(c.relname) FROM pg_class c "
            "JOIN pg_namespace n ON n.oid = c.relnamespace "
            "WHERE n.nspname = current_schema() AND c.relkind = 'r'"
        ).scalars().all()
        for table in tables:
            connection.exec_driver_sql(f"VACUUM FULL {table}")
        return int(
            connection.exec_driver_sql(
                "SELECT coalesce(sum(pg_total_relation_size(c.oid)), 0) FROM pg_class c "
                "JOIN pg_namespace n ON n.oid = c.relnamespace "
                "WHERE n.nspname = current_schema() AND c.relkind = 'r'"
            ).scalar()
        )


def measure(url: str, n: int, k: int) -> dict:
    from service import ingest, store
    from service.database import Database
    from service.db import make_engine, upgrade
    from service.registration import register_survey
    from service.rescreen import rescreen
    from service.settings import Settings

    engine = make_engine(url)
    upgrade(engine)
    database = Database(engine)
    settings = Settings(database_url=url)
    try:
        register_survey(database, _document(k))
        empty = _size(database)
        rng = np.random.default_rng(17)
        start = time.perf_counter()
        for first in range(0, n, BATCH):  # bounded by n
            rows = _rows(rng, first, min(BATCH, n - first), k)
            with database.write() as session:
                survey = store.get_survey(session, SURVEY)
                ingest.ingest(session, survey, rows, ingest.IngestOptions(), settings)
        ingested = time.perf_counter() - start
        start = time.perf_counter()
        with database.write() as session:
            rescreen(session, store.get_survey(session, SURVEY), settings)
        rescreened = time.perf_counter() - start
        full = _size(database)
    finally:
        database.dispose()
    return {
        "backend": engine.dialect.name, "empty": empty, "full": full,
        "per_respondent": (full - empty) / n, "ingest_seconds": ingested,
        "rescreen_seconds": rescreened,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--respondents", type=int, default=20_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/storage.md (date, commit)")
    args = parser.parse_args()
    from detectors import REGISTRY

    results = []
    with tempfile.TemporaryDirectory() as folder:
        results.append(measure(f"sqlite:///{Path(folder) / 'bench.db'}", args.respondents,
                               args.items))
    postgres = os.environ.get("HEEDFUL_TEST_POSTGRES_URL")
    if postgres:
        from sqlalchemy import create_engine

        schema = f"heedful_bench_{uuid.uuid4().hex[:12]}"
        admin = create_engine(postgres)
        with admin.begin() as connection:
            connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
        joiner = "&" if "?" in postgres else "?"
        try:
            results.append(measure(f"{postgres}{joiner}options=-csearch_path%3D{schema}",
                                   args.respondents, args.items))
        finally:
            with admin.begin() as connection:
                connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
            admin.dispose()
    lines = [
        f"{args.respondents:,} respondents x {args.items} items, {len(REGISTRY)} detectors, "
        "posted in batches of 5,000, then re-screened against a reference sample; "
        "database compacted before measuring",
    ]
    for r in results:
        lines.append(
            f"  {r['backend']:<10} {r['per_respondent']:8,.0f} bytes per respondent "
            f"({(r['full'] - r['empty']) / 1e6:,.1f} MB for the respondents; ingest "
            f"{r['ingest_seconds']:.1f} s, re-screen {r['rescreen_seconds']:.1f} s)"
        )
    if not postgres:
        lines.append("  postgresql not measured (HEEDFUL_TEST_POSTGRES_URL is not set)")
    print("\n".join(lines))
    if args.write:
        import datetime as dt
        import subprocess

        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                                capture_output=True, text=True).stdout.strip()
        (ROOT / "docs" / "storage.md").write_text(
            "# Database bytes per respondent\n\n"
            f"Written by `tests/benchmarks/bench_storage.py` on {dt.date.today()} at commit "
            f"`{commit}`. The layout is described in DEVELOPERS.md (\"Stored results\").\n\n"
            "```\n" + "\n".join(lines) + "\n```\n"
        )


if __name__ == "__main__":
    main()
