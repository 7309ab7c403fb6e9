"""Benchmark: ``heedful nightly`` on a survey of 1,000,000 respondents x 50 items in SQLite.

Phases, each in its own process so each peak memory figure (resident set) is its own:

1. ``generate``: register a 50-item instrument and bulk-insert the respondents (50,000 rows per
   insert, a bounded loop), as stored answers that were never screened (not timed as nightly).
   Then the stored answers are read into a matrix both ways (one row at a time, and as
   ``rescreen.read_stored`` does: chunks, column-wise parsing), and the times compared.
2. ``first``: the first nightly run: every result is stale (never screened), so every detector
   runs on everyone and every result is written; then the export (.sav) and the report.
3. 1% new respondents are posted through the ingest use case (screened on arrival, not
   timed), then the nightly run: the reference sample is kept (it changes only when the
   number of respondents changed by 5%), so nothing is stale; the export and report are
   written.
4. 5% more are posted, then the nightly run: a new reference sample is estimated, so every
   respondent is stale against it; only the reference-based detectors' results are rewritten.
5. A second run right after: nothing is stale.

Prints seconds and peak memory per phase, and for each nightly run how long re-screening took
apart from the files, and the files' parts: the one read of the stored results that the export
and the report share, the export and the report. Aim: each nightly run under 2 minutes and 3 GB.

    python tests/benchmarks/bench_nightly.py [--respondents 1000000] [--folder DIR] [--keep DB]
        [--write]

``--write`` puts the figures in ``docs/speed-nightly.md`` and the README, dated, with the commit.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

ITEMS = 50
CHUNK = 50_000


def instrument_document() -> dict:
    items = [
        {"id": f"q{i + 1:02d}", "text": f"statement {i + 1}", "scale": f"s{i // 10}",
         "keyed": 1 if i % 2 == 0 else -1, "block": f"page{i // 10}"}
        for i in range(ITEMS)
    ]
    return {"survey": "bench", "title": "Benchmark survey", "response_format": {"points": 5},
            "items": items}


def answers_block(rng: np.random.Generator, n: int, keyed: np.ndarray) -> np.ndarray:
    """Attentive respondents (a trait per scale plus noise) with 5% careless ones and 2% of
    answers missing, as int8 with -128 for missing."""
    trait = rng.normal(size=(n, ITEMS // 10)).repeat(10, axis=1)
    codes = np.clip(np.rint(3 + keyed * trait + rng.normal(0, 0.8, (n, ITEMS))), 1, 5)
    careless = rng.random(n) < 0.05
    codes[careless] = rng.integers(1, 6, size=(int(careless.sum()), ITEMS))
    straight = rng.random(n) < 0.02
    codes[straight] = rng.integers(1, 6, size=(int(straight.sum()), 1))
    codes = codes.astype(np.int8)
    codes[rng.random((n, ITEMS)) < 0.02] = -128
    return codes


def generate(url: str, n: int) -> None:
    import orjson
    from sqlalchemy import insert

    from service import store
    from service.database import Database
    from service.db import make_engine, upgrade
    from service.models import Respondent

    engine = make_engine(url)
    upgrade(engine)
    database = Database(engine)
    document = instrument_document()
    with database.write() as session:
        registered = store.register_version(session, document, document["title"])
        survey_id, version_id = registered.survey.id, registered.version.id
    keyed = np.array([item["keyed"] for item in document["items"]])
    items = [item["id"] for item in document["items"]]
    rng = np.random.default_rng(2027)
    # Arrivals spread over the last 30 days (in the past, as stored arrivals are).
    start = dt.datetime.now(dt.UTC) - dt.timedelta(days=31)
    table = Respondent.__table__
    for first in range(0, n, CHUNK):  # bounded: n / CHUNK inserts
        size = min(CHUNK, n - first)
        codes = answers_block(rng, size, keyed)
        seconds = rng.uniform(120, 900, size)
        rows = []
        for k, row in enumerate(codes.tolist()):
            answers = {item: v for item, v in zip(items, row, strict=True) if v != -128}
            text = orjson.dumps(answers, option=orjson.OPT_SORT_KEYS)
            received = start + dt.timedelta(days=30 * (first + k) / n)
            rows.append(
                {
                    "survey_id": survey_id, "respondent_id": f"b{first + k:07d}",
                    "survey_version_id": version_id,
                    # one byte per item; -128 (a left-out item) as service.answers stores it
                    "answer_codes": codes[k].tobytes(),
                    "answers_digest": hashlib.sha256(text).hexdigest()[:16],
                    "duration_seconds": float(seconds[k]), "received_at": received,
                    "screened_at": received, "flag_count": 0, "flag_bits": 0,
                }
            )
        with database.write() as session:
            session.connection().execute(insert(table), rows)
    database.dispose()


def arrivals(url: str, n: int) -> None:
    from service import ingest, store
    from service.database import Database
    from service.db import make_engine
    from service.settings import Settings

    document = instrument_document()
    keyed = np.array([item["keyed"] for item in document["items"]])
    items = [item["id"] for item in document["items"]]
    codes = answers_block(np.random.default_rng(n), n, keyed)
    rows = [
        {"respondent_id": f"new{n}-{k:07d}",  # a fresh id series per posting
         "answers": {item: (None if v == -128 else v) for item, v in zip(items, row, strict=True)},
         "duration_seconds": 300.0}
        for k, row in enumerate(codes.tolist())
    ]
    settings = Settings(database_url=url)
    database = Database(make_engine(url))
    for first in range(0, n, 10_000):
        with database.write() as session:
            ingest.ingest(session, store.get_survey(session, "bench"), rows[first : first + 10_000],
                        ingest.IngestOptions(), settings)
    database.dispose()


def compare_read(url: str) -> dict:
    """Stored answers to a matrix as the nightly job reads them (``rescreen.read_stored``)."""
    from service import rescreen, store
    from service.database import Database
    from service.db import make_engine

    database = Database(make_engine(url))
    with database.read() as session:
        survey = store.get_survey(session, "bench")
        [target] = rescreen.screening_targets(session, survey)
        t0 = time.perf_counter()
        stored = rescreen.read_stored(session, survey.id, target)
        seconds = time.perf_counter() - t0
        assert stored.matrix.answers.shape[1] == len(target.screener.instrument.item_ids)
    database.dispose()
    return {"read": seconds}


def nightly(url: str, out: str) -> dict:
    from service import nightly as job
    from service.database import Database
    from service.db import make_engine
    from service.settings import Settings

    settings = Settings(database_url=url)
    database = Database(make_engine(url))
    timings: dict[str, float] = {}

    def timed(part: str, function):
        def wrapper(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                timings[part] = time.perf_counter() - t0

        return wrapper

    job.exports.write_export = timed("export", job.exports.write_export)
    job.reports.build_report = timed("report", job.reports.build_report)
    job.read_survey = timed("read", job.read_survey)
    [run] = job.run_nightly(database, settings, out)
    database.dispose()
    if run.failed:
        raise SystemExit(f"nightly failed: {run.error}")
    return {"line": run.line(), "stale": run.stale, "written": run.counts.results_written,
            "changed": run.counts.changed, **timings}


def child(args: argparse.Namespace) -> None:
    t0 = time.perf_counter()
    extra: dict = {}
    if args.phase == "generate":
        generate(args.url, args.respondents)
    elif args.phase == "arrivals":
        arrivals(args.url, args.respondents)
    elif args.phase == "read":
        extra = compare_read(args.url)
    else:
        extra = nightly(args.url, args.out)
    seconds = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"seconds": seconds, "peak_mb": peak, **extra}))


def run_phase(phase: str, url: str, respondents: int, out: str) -> dict:
    result = subprocess.run(
        [sys.executable, __file__, "--child", phase, "--url", url, "--respondents",
         str(respondents), "--out", out],
        check=True, capture_output=True, text=True,
    )
    return json.loads(result.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--folder", help="where the database goes (default: a temporary one)")
    parser.add_argument("--keep", metavar="DB",
                        help="use this database file: generate it when missing, keep it after")
    parser.add_argument("--child", dest="phase")
    parser.add_argument("--url")
    parser.add_argument("--out")
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-nightly.md and the README")
    args = parser.parse_args()
    if args.phase:
        child(args)
        return
    lines: list[str] = []

    def say(line: str) -> None:
        print(line, flush=True)
        lines.append(line)

    n = args.respondents
    with tempfile.TemporaryDirectory(dir=args.folder) as folder:
        path = Path(args.keep) if args.keep else Path(folder) / "bench.db"
        url = f"sqlite:///{path}"
        out = str(Path(folder) / "nightly")
        if not path.exists():
            generated = run_phase("generate", url, n, out)
            say(f"generated {n:,} respondents x {ITEMS} items: {generated['seconds']:.1f} s "
                f"(peak {generated['peak_mb']:,.0f} MB)")
        read = run_phase("read", url, n, out)
        say(f"stored answers to a matrix: {read['read']:.1f} s")
        phases = [("first run (nothing screened yet)", None),
                  ("after 1% new respondents (reference kept)", n // 100),
                  ("after 5% more (new reference: everyone stale)", n // 20),
                  ("second run in a row", None)]
        for label, posted in phases:
            if posted:
                run_phase("arrivals", url, posted, out)
            result = run_phase("nightly", url, n, out)
            files = sum(result.get(part, 0.0) for part in ("read", "export", "report"))
            say(
                f"nightly, {label}: {result['seconds']:.1f} s, peak {result['peak_mb']:,.0f} MB "
                f"(re-screening {result['seconds'] - files:.1f} s, reading the results "
                f"{result.get('read', 0):.1f} s, export {result.get('export', 0):.1f} s, report "
                f"{result.get('report', 0):.1f} s; "
                f"{result['stale']:,} stale, {result['written']:,} results written, "
                f"{result['changed']:,} changed)"
            )
        size = os.path.getsize(path) / 1e9
        say(f"database: {size:.2f} GB ({os.path.getsize(path) / n:,.0f} bytes per respondent)")
    if args.write:
        from figures import write_figures, write_readme_block

        # 1,000,000 respondents: the main figures; another size has a file and block of its own.
        main_size = n == 1_000_000
        written = write_figures(
            "speed-nightly.md" if main_size else f"speed-nightly-{n}.md",
            "Speed of the nightly job" + ("" if main_size else f" at {n:,} respondents"),
            "bench_nightly.py", lines,
        )
        text = written.read_text().split("\n", 2)[2]  # the stamp and the figures
        if main_size:
            write_readme_block(START, END, text.rstrip("\n"))
        else:
            write_readme_block(
                f"<!-- nightly speed at {n:,}: written by bench_nightly.py -->",
                f"<!-- end nightly speed at {n:,} -->", text.rstrip("\n"),
            )


#: The README's copy of the figures lies between these lines.
START = "<!-- nightly speed: written by bench_nightly.py -->"
END = "<!-- end nightly speed -->"


if __name__ == "__main__":
    main()
