"""The nightly job: refresh reference samples, re-screen stale results, write exports and reports.

    heedful nightly --out DIR [--survey S ...] [--format sav] [--database URL]

For each survey (every registered one by default), one after the other:

1. **Screeners.** Each stored respondent is screened with its survey version's screener, or
   with the current version's when its answers fit the current version unchanged (the same
   items in the same order with the same answer ranges; see ``screeners.answers_fit``), e.g. after
   a new version only changed a cut-off. Such respondents move to the current version.
2. **Reference sample.** For a screener whose detectors use one, a new reference sample is
   estimated from all the respondents screened with it when there are at least
   ``HEEDFUL_REFERENCE_MIN_RESPONDENTS`` and either there is none yet or the number of stored
   respondents differs from the number the latest was estimated from by at least
   ``REFERENCE_REFRESH_SHARE`` (5%) of it. Otherwise the latest one is kept: a second run in a
   row estimates nothing, and a night with few arrivals re-screens nobody (arrivals are screened
   against the current reference sample when they come).
3. **Stale results.** A respondent's stored result is *stale* when any of these holds:

   - it was screened with another survey version than the one it is screened with now
     (step 1);
   - it was screened against another reference sample than the one now in force (step 2),
     or against none while one exists;
   - its screener fingerprint differs from the screener's now: the fingerprint covers the
     version's instrument document and every registered detector's name and version, so a
     detector added, removed or given a new version makes every result stale (as does a
     result stored before fingerprints were kept).

   Stale respondents are re-screened with ``rescreen.rescreen_rows``, the code ``heedful
   rescreen`` uses, in chunks of ``NIGHTLY_CHUNK`` respondents, each chunk its own
   transaction. An interrupted run leaves whole chunks done; the next run finds the rest
   still stale and finishes them. Where only the reference changed, only the results of the
   detectors that use it are rewritten (the others depend on the answers and the screener
   alone). A result that changed is kept in the screening history first (see
   ``rescreen.rescreen_rows``).
4. **Files**, in ``DIR/<date>/<survey>/`` (the run's local date): the survey's export
   (``<survey>.sav`` by default, without the respondents reviewed as ``exclude``), the
   screening report ``report.html`` and ``nightly.json`` (what the run did). The export and
   the report share one read of the survey's stored respondents and results
   (``survey_data.read_survey``). Each file is written atomically.

A survey that fails (e.g. a stored instrument that no longer parses) is reported with the
reason and the others still run; the command then exits with 1.
"""

from __future__ import annotations

import datetime as dt
import json
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from detectors import fit_references

from . import exports, reports, store
from . import rescreen as jobs_rescreen
from .database import Database
from .db import utcnow
from .files import write_atomic
from .models import Survey
from .screeners import reference_data, uses_reference
from .settings import Settings
from .survey_data import read_survey

__all__ = [
    "NIGHTLY_CHUNK",
    "REFERENCE_REFRESH_SHARE",
    "DEFAULT_FORMAT",
    "DEFAULT_WITHOUT",
    "NOTE",
    "WITHOUT_FLAGGED_CAUTION",
    "SurveyRun",
    "Progress",
    "needs_new_reference",
    "run_nightly",
    "nightly_survey",
]

#: A new reference sample is estimated when the number of respondents changed by this share of
#: the number the latest was estimated from. Heedful's choice: a mean and covariance estimated
#: from n respondents change by far less than their sampling error when a few percent more
#: arrive, while every new reference makes every stored result stale (a full re-screen).
REFERENCE_REFRESH_SHARE = 0.05
#: Respondents re-screened per transaction: small enough that a webhook post waits at most a
#: few seconds for the write lock (SQLite), large enough that per-chunk costs do not count.
NIGHTLY_CHUNK = 20_000
#: The export written by default: SPSS, the format most survey analysts open.
DEFAULT_FORMAT = "sav"
#: Left out of the nightly export by default: respondents a reviewer decided to exclude.
DEFAULT_WITHOUT = ("excluded",)
#: Written to every run record: what the files may and may not be used for.
NOTE = (
    "Flags, verdicts and careless scores are evidence for a human reviewer's decision, not a "
    "verdict on a person."
)
#: Printed and recorded when a run leaves flagged respondents out of its export.
WITHOUT_FLAGGED_CAUTION = (
    "This export leaves out every respondent with a flag, on the screening's evidence alone and "
    "without a person having read it. A strong opinion, a short scale or a badly translated "
    "item raise flags too, and style flags are not carelessness. Review the flagged "
    "respondents, record decisions, and export without the excluded instead; do not act on "
    "this file's omissions about any person (exclusion, incentives) without review."
)


def _after_chunk(survey: str, done: int, total: int) -> None:
    """Called after each chunk is committed (a seam for tests that interrupt a run)."""


@dataclass
class SurveyRun:
    """What the nightly run did for one survey."""

    survey: str
    respondents: int = 0
    stale: int = 0
    counts: jobs_rescreen.RescreenCount = field(default_factory=jobs_rescreen.RescreenCount)
    references: list[dict[str, Any]] = field(default_factory=list)
    files: list[Path] = field(default_factory=list)
    error: str | None = None
    seconds: float = 0.0
    without: tuple[str, ...] = ()
    left_out: int = 0
    cautions: list[str] = field(default_factory=list)

    @property
    def failed(self) -> bool:
        return self.error is not None

    def line(self) -> str:
        """One line for the operator."""
        if self.error is not None:
            return f"{self.survey}: FAILED: {self.error}"
        references = (
            ", new reference sample " + ", ".join(
                f"{r['id']} (version {r['version']}, {r['respondents']:,} respondents)"
                for r in self.references
            )
            if self.references else ""
        )
        folder = self.files[0].parent if self.files else "-"
        return (
            f"{self.survey}: {self.respondents:,} respondents, {self.stale:,} stale, "
            f"{self.counts.rescreened:,} re-screened, {self.counts.changed:,} result(s) changed"
            f"{references}; files in {folder} ({self.seconds:.1f} s)"
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "survey": self.survey,
            "respondents": self.respondents,
            "stale": self.stale,
            "rescreened": self.counts.rescreened,
            "changed": self.counts.changed,
            "skipped": self.counts.skipped,
            "results_written": self.counts.results_written,
            "references": [
                {**r, "created_at": r["created_at"].isoformat()} for r in self.references
            ],
            "files": [p.name for p in self.files],
            "export_without": list(self.without),
            "export_left_out": self.left_out,
            "note": NOTE,
            "cautions": list(self.cautions),
            "error": self.error,
            "seconds": round(self.seconds, 3),
        }


class Progress:
    """A progress bar on a terminal, plain log lines (every tenth of the way) otherwise."""

    WIDTH = 30

    def __init__(self, stream: TextIO, interactive: bool | None = None):
        self.stream = stream
        self.interactive = stream.isatty() if interactive is None else interactive
        self.label = ""
        self.total = 0
        self.logged = -1
        self.drawn = 0.0

    def start(self, label: str, total: int) -> None:
        self.label, self.total, self.logged, self.drawn = label, total, -1, 0.0
        self.update(0)

    def update(self, done: int) -> None:
        share = 1.0 if self.total <= 0 else min(1.0, done / self.total)
        if self.interactive:
            now = time.monotonic()
            if share < 1.0 and now - self.drawn < 0.1:
                return
            self.drawn = now
            filled = int(round(share * self.WIDTH))
            bar = "#" * filled + "." * (self.WIDTH - filled)
            self.stream.write(
                f"\r{self.label[:48]:<48} [{bar}] {share:4.0%} {done:,}/{self.total:,}"
            )
            self.stream.flush()
            return
        tenth = int(share * 10)
        if tenth > self.logged:
            self.logged = tenth
            stamp = dt.datetime.now().strftime("%Y-%m-%d %H:%M:%S")
            self.stream.write(f"{stamp} {self.label}: {done:,} of {self.total:,}\n")
            self.stream.flush()

    def finish(self) -> None:
        if self.interactive and self.label:
            self.stream.write("\r" + " " * (48 + self.WIDTH + 30) + "\r")
            self.stream.flush()
        self.label = ""


def needs_new_reference(
    target: jobs_rescreen.Target, latest: Any, settings: Settings, share: float = REFERENCE_REFRESH_SHARE
) -> bool:
    """Whether to estimate a new reference sample for ``target`` (see the module docstring)."""
    if not uses_reference(target.screener):
        return False
    if target.respondents < settings.reference_min_respondents:
        return False
    if latest is None:
        return True
    return abs(target.respondents - latest.respondents) >= share * latest.respondents


@dataclass
class _Plan:
    target: jobs_rescreen.Target
    reference_id: int | None
    renew: bool = False
    reference: Any = None
    new_reference: dict[str, Any] | None = None
    stored: jobs_rescreen.Stored | None = None


def nightly_survey(
    database: Database,
    settings: Settings,
    name: str,
    folder: Path,
    *,
    fmt: str = DEFAULT_FORMAT,
    without: Sequence[str] = DEFAULT_WITHOUT,
    chunk: int = NIGHTLY_CHUNK,
    progress: Progress | None = None,
) -> SurveyRun:
    """Run the nightly steps for one survey; raises on failure (``run_nightly`` catches)."""
    started = time.perf_counter()
    run = SurveyRun(name, without=tuple(without))
    if "flagged" in without:
        run.cautions.append(WITHOUT_FLAGGED_CAUTION)
    now = utcnow()
    plans: list[_Plan] = []
    with database.read() as session:
        survey = store.get_survey(session, name)
        if survey is None:
            raise LookupError(f"no survey {name!r} is registered")
        survey_id, current_version = survey.id, survey.current_version_id
        run.respondents = store.count_respondents(session, survey_id)
        for target in jobs_rescreen.screening_targets(session, survey):
            screener = target.screener
            latest = store.latest_reference(session, screener.version_id)
            renew = needs_new_reference(target, latest, settings)
            keep = latest is not None and uses_reference(screener) and not renew
            plan = _Plan(target, latest.id if keep and latest is not None else None, renew)
            if not renew and not store.count_stale(
                session, survey_id, target.sources, screener.version_id, plan.reference_id,
                screener.fingerprint,
            ):
                plans.append(plan)
                continue
            if progress is not None:
                progress.start(f"{name}: reading version {screener.number}", target.respondents)
            plan.stored = jobs_rescreen.read_stored(
                session, survey_id, target,
                progress=None if progress is None else progress.update,
            )
            if progress is not None:
                progress.finish()
            if renew:
                plan.reference = fit_references(screener.instrument, plan.stored.matrix)
            elif plan.reference_id is not None:
                plan.reference = reference_data(session, plan.reference_id)
            plans.append(plan)

    # New reference samples, and the one arrivals are screened against, in one transaction.
    with database.write() as session:
        survey = session.get(Survey, survey_id)
        for plan in plans:
            screener = plan.target.screener
            if plan.renew and plan.stored is not None:
                n = len(plan.stored)
                sample = jobs_rescreen.save_reference(session, screener, n, plan.reference, now)
                plan.reference_id = sample.id
                plan.new_reference = {
                    "id": sample.id, "version": screener.number, "respondents": n,
                    "created_at": now,
                }
                run.references.append(plan.new_reference)
            if screener.version_id == current_version and survey is not None:
                survey.current_reference_id = plan.reference_id

    for plan in plans:
        stored = plan.stored
        if stored is None:
            continue
        screener = plan.target.screener
        stale, rescore = stored.stale(screener, plan.reference_id)
        positions = np.flatnonzero(stale)
        run.stale += len(positions)
        if progress is not None:
            progress.start(f"{name}: re-screening version {screener.number}", len(positions))
        for start in range(0, len(positions), chunk):
            part = positions[start : start + chunk]
            with database.write() as session:
                counts = jobs_rescreen.rescreen_rows(
                    session, screener, stored, part, plan.reference_id, plan.reference, now,
                    rescore=rescore[part],
                )
            run.counts.add(counts)
            done = start + len(part)
            if progress is not None:
                progress.update(done)
            _after_chunk(name, done, len(positions))
        if progress is not None:
            progress.finish()
        plan.stored = None  # free the matrix before the next target

    if progress is not None:
        progress.start(f"{name}: writing the export and the report", 2)
    folder.mkdir(parents=True, exist_ok=True)
    export_path = folder / f"{name}{exports.SUFFIXES[fmt]}"
    report_path = folder / "report.html"
    with database.read() as session:
        survey = store.get_survey(session, name)
        assert survey is not None
        # One read of the stored results for both files.
        stored_survey = read_survey(session, survey)
        written = exports.write_export(
            session, survey, fmt, export_path, without=without, stored=stored_survey
        )
        run.left_out = written.left_out
        if progress is not None:
            progress.update(1)
        html = reports.build_report(session, survey, stored=stored_survey)
        del stored_survey
    write_atomic(report_path, lambda p: Path(p).write_text(html, encoding="utf-8"))
    if progress is not None:
        progress.update(2)
        progress.finish()
    run.files = [export_path, report_path]
    run.seconds = time.perf_counter() - started
    summary_path = folder / "nightly.json"
    text = json.dumps(run.as_dict(), indent=2) + "\n"
    write_atomic(summary_path, lambda p: Path(p).write_text(text, encoding="utf-8"))
    run.files.append(summary_path)
    return run


def run_nightly(
    database: Database,
    settings: Settings,
    out: str | Path,
    *,
    surveys: Sequence[str] | None = None,
    fmt: str = DEFAULT_FORMAT,
    without: Sequence[str] = DEFAULT_WITHOUT,
    day: dt.date | None = None,
    chunk: int = NIGHTLY_CHUNK,
    progress: Progress | None = None,
    report: Callable[[SurveyRun], None] | None = None,
) -> list[SurveyRun]:
    """The nightly job for ``surveys`` (default: every registered survey, by id).

    A failing survey is recorded with its reason (``SurveyRun.error``) and the others still
    run. ``report(run)`` is called as each survey finishes. Files go to ``out/<day>/<survey>``
    (``day``: today's local date by default).
    """
    if fmt not in exports.EXPORT_FORMATS:
        raise ValueError(f"format must be one of {', '.join(exports.EXPORT_FORMATS)}; got {fmt!r}")
    if chunk < 1:
        raise ValueError(f"chunk must be at least 1; got {chunk}")
    day = day or dt.date.today()
    if surveys is None:
        with database.read() as session:
            surveys = [s.survey for s, _, _ in store.list_surveys(session)]
    runs = []
    for name in dict.fromkeys(surveys):
        try:
            run = nightly_survey(
                database, settings, name, Path(out) / day.isoformat() / name, fmt=fmt,
                without=without, chunk=chunk, progress=progress,
            )
        except Exception as error:  # one survey's failure must not stop the others
            if progress is not None:
                progress.finish()
            reason = str(error) or type(error).__name__
            run = SurveyRun(name, error=" ".join(reason.split()))
        runs.append(run)
        if report is not None:
            report(run)
    return runs
