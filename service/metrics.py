"""The service's metrics, served at ``/metrics`` in the Prometheus text format.

One :class:`Metrics` per application (its own registry, so that several applications in one
process, as in the tests, do not share counts). Names start with ``heedful_``; labels carry no
respondent or survey data beyond the survey id (a handful per service), so the label sets stay
small.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    exposition,
    generate_latest,
)

if TYPE_CHECKING:
    from .ingest import Ingested

__all__ = ["Metrics", "CONTENT_TYPE"]

CONTENT_TYPE = exposition.CONTENT_TYPE_LATEST

#: Request latency buckets (seconds): single posts take milliseconds, reports and exports longer.
_LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 120.0)
_JOB_BUCKETS = (0.1, 0.5, 1.0, 5.0, 15.0, 60.0, 300.0, 900.0, 3600.0)


class Metrics:
    """Counters, histograms and gauges of one application."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.requests = Histogram(
            "heedful_request_duration_seconds",
            "Time from a request's arrival to the end of its reply, by route and status class.",
            ["method", "route", "status"], buckets=_LATENCY_BUCKETS, registry=r,
        )
        self.respondents = Counter(
            "heedful_respondents_total",
            "Respondents of posted responses by outcome (stored, replaced, duplicate, rejected).",
            ["outcome"], registry=r,
        )
        self.refusals = Counter(
            "heedful_refusals_total",
            "Requests refused, by status and problem type (signature, key, limit, input...).",
            ["status", "reason"], registry=r,
        )
        self.flags = Counter(
            "heedful_flags_total",
            "Flags raised on respondents screened at arrival, by detector.",
            ["detector"], registry=r,
        )
        self.jobs = Counter(
            "heedful_jobs_total", "Long-running jobs by kind and outcome.",
            ["kind", "outcome"], registry=r,
        )
        self.job_seconds = Histogram(
            "heedful_job_duration_seconds", "Duration of long-running jobs, by kind.",
            ["kind"], buckets=_JOB_BUCKETS, registry=r,
        )
        self.queue_depth = Gauge(
            "heedful_ingest_queue_depth",
            "Posts waiting for the writer (not counting the group being written).", registry=r,
        )

    def watch_queue(self, depth: Callable[[], int]) -> None:
        """Read the queue depth when the metrics are scraped."""
        self.queue_depth.set_function(depth)

    def count_ingested(self, ingested: Ingested) -> None:
        """Outcomes and flags of one answered post."""
        if ingested.stored:
            self.respondents.labels("stored").inc(ingested.stored)
        if ingested.replaced:
            self.respondents.labels("replaced").inc(ingested.replaced)
        if ingested.duplicates:
            self.respondents.labels("duplicate").inc(ingested.duplicates)
        if ingested.rejected:
            self.respondents.labels("rejected").inc(len(ingested.rejected))
        raised: dict[str, int] = {}
        for outcome in ingested.results:
            if outcome.status != "duplicate" and outcome.summary is not None:
                for name in outcome.summary.flags:
                    raised[name] = raised.get(name, 0) + 1
        for name, count in raised.items():
            self.flags.labels(name).inc(count)

    @contextmanager
    def job(self, kind: str) -> Iterator[None]:
        """Count and time one job; an exception counts it as failed (or as its ``job_outcome``:
        cancelled, taken over) and goes on."""
        started = time.perf_counter()
        try:
            yield
        except BaseException as error:
            self.jobs.labels(kind, getattr(error, "job_outcome", "failed")).inc()
            raise
        else:
            self.jobs.labels(kind, "done").inc()
        finally:
            self.job_seconds.labels(kind).observe(time.perf_counter() - started)

    def render(self) -> bytes:
        return generate_latest(self.registry)
