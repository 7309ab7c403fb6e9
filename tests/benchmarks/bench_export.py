"""Benchmark: exporting a stored survey of 1,000,000 respondents x 50 items (SQLite).

Generates the survey straight into a SQLite database with bulk inserts (answers as a byte per
item, every detector's packed result, a verdict, a careless score, reviews for 1%), then runs
``write_export`` once per format, each in a fresh process, and prints the wall time and that
process's peak memory.

    python tests/benchmarks/bench_export.py                 # 1,000,000 x 50
    python tests/benchmarks/bench_export.py --respondents 200000 --keep /tmp/bench.db
"""

from __future__ import annotations

import argparse
import datetime as dt
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

SURVEY = "bench-export"
#: Respondents written per insert transaction while generating (bounds memory).
GENERATE_CHUNK = 50_000


def _document(k: int) -> dict:
    from bench_survey import bench_document

    return bench_document(SURVEY, "Bench", k)


def generate(url: str, n: int, k: int) -> None:
    from detectors import REGISTRY
    from service import outcomes, store
    from service.answers import NULL
    from service.commands import register_document
    from service.database import Database
    from service.db import make_engine, upgrade

    engine = make_engine(url)
    upgrade(engine)
    database = Database(engine)
    register_document(database, _document(k))
    with database.read() as session:
        survey = store.get_survey(session, SURVEY)
        survey_id, version_id = survey.id, survey.current_version_id
    rng = np.random.default_rng(5)
    detectors = list(REGISTRY)
    start = dt.datetime(2027, 5, 1, tzinfo=dt.UTC)
    respondent_sql = (
        "INSERT INTO respondents (id, survey_id, respondent_id, survey_version_id, answer_codes, "
        "answers_digest, submitted_at, duration_seconds, received_at, screened_at, flag_count, "
        "flag_bits, verdict, careless_score, review_decision, results) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
    )
    with database.write() as session:
        numbers = outcomes.detector_codes(session, detectors).by_name
    verdicts = np.array(["ok", "review", "likely_careless"], dtype=object)
    for first in range(0, n, GENERATE_CHUNK):
        m = min(GENERATE_CHUNK, n - first)
        trait = rng.normal(size=(m, 1))
        keyed = np.where(np.arange(k) % 2 == 0, 1, -1)
        answers = np.clip(np.rint(3 + keyed * trait + rng.normal(0, 0.8, (m, k))), 1, 5)
        missing = rng.random((m, k)) < 0.02
        # stored as service.answers does: a byte per item, an explicit null as NULL
        stored = np.where(missing, NULL, answers).astype(np.int8)
        documents = [row.tobytes() for row in stored]
        received = [
            (start + dt.timedelta(seconds=int(s))).strftime("%Y-%m-%d %H:%M:%S.%f")
            for s in (first + np.arange(m)) * 2
        ]
        flags = rng.random((m, len(detectors))) < 0.04
        count = flags.sum(axis=1)
        verdict = verdicts[np.minimum(count, 2)]
        careless = rng.random(m)
        review = np.where(rng.random(m) < 0.01, "exclude", None)
        ids = np.arange(first + 1, first + m + 1)
        packed = np.zeros((m, len(detectors)), dtype=outcomes.PACKED)
        packed["code"] = [numbers[name] for name in detectors]
        packed["mark"] = flags * 4  # assessed (state 0), flagged or not
        packed["score"] = rng.random((m, len(detectors)))
        width = len(detectors) * outcomes.PACKED.itemsize
        blob = packed.tobytes()
        bits = (flags * (1 << np.array([numbers[n] for n in detectors]))).sum(axis=1)
        respondents = [
            (int(pk), survey_id, f"r{pk:07d}", version_id, document, f"{pk:016x}", when,
             float(d), when, when, int(c), int(b), v, float(cs), r,
             blob[i * width : (i + 1) * width])
            for i, (pk, document, when, d, c, b, v, cs, r) in enumerate(zip(
                ids.tolist(), documents, received, rng.uniform(120, 900, m).tolist(),
                count.tolist(), bits.tolist(), verdict.tolist(), careless.tolist(),
                review.tolist(), strict=True,
            ))
        ]
        with engine.begin() as connection:
            connection.exec_driver_sql(respondent_sql, respondents)
    database.dispose()


def child(url: str, fmt: str, out: str) -> None:
    from service import store
    from service.database import Database
    from service.db import make_engine
    from service.exports import write_export

    database = Database(make_engine(url))
    start = time.perf_counter()
    with database.read() as session:
        summary = write_export(session, store.get_survey(session, SURVEY), fmt, out)
    seconds = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    size = Path(out).stat().st_size / 1e6
    print(f"  {fmt:<8} {seconds:7.1f} s  {summary.respondents / seconds:>9,.0f} respondents/s  "
          f"peak {peak:,.0f} MB  file {size:,.0f} MB", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--keep", metavar="FILE",
                        help="SQLite file to keep (reused when it already exists)")
    parser.add_argument("--formats", default="csv,parquet,sav,dta")
    parser.add_argument("--child", nargs=3, metavar=("URL", "FORMAT", "OUT"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    with tempfile.TemporaryDirectory() as folder:
        path = Path(args.keep) if args.keep else Path(folder) / "bench.db"
        url = f"sqlite:///{path}"
        if not path.exists():
            start = time.perf_counter()
            generate(url, args.respondents, args.items)
            print(f"generated {args.respondents:,} respondents x {args.items} items in "
                  f"{time.perf_counter() - start:.0f} s ({path.stat().st_size / 1e6:,.0f} MB)")
        print(f"write_export, {args.respondents:,} x {args.items} from SQLite, one process each:")
        for fmt in args.formats.split(","):
            out = Path(folder) / f"export.{fmt}"
            subprocess.run(
                [sys.executable, __file__, "--child", url, fmt, str(out)], check=True,
                stdout=sys.stdout,
            )
            out.unlink(missing_ok=True)


if __name__ == "__main__":
    main()
