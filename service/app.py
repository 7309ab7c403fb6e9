"""Assembles the FastAPI application: settings, database, problem handlers, routers."""

from __future__ import annotations

import gc
import importlib
import json
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from importlib.metadata import PackageNotFoundError, version
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi

from . import problems
from .api import (
    detectors,
    exports,
    health,
    jobs,
    metrics,
    reports,
    respondents,
    responses,
    surveys,
)
from .database import Database
from .db import make_engine, upgrade
from .ingest_queue import IngestQueue
from .job_queue import JobQueue
from .limits import Limits
from .metrics import Metrics
from .observability import RequestContext
from .pages import routes as review_pages
from .schemas import ProblemOut
from .settings import Settings, get_settings

__all__ = ["create_app", "openapi_document", "prepare_process"]

#: Modules the library imports only where it uses them (so that commands start fast), loaded by
#: the service before it serves: the first posts do not wait for them, and the collector's
#: freeze below covers their objects.
SCREENING_MODULES = ("pandas", "scipy.special", "scipy.stats", "scipy.sparse.csgraph")

DESCRIPTION = """\
Heedful screens Likert-type survey responses for careless answering and response styles while a
survey is in the field. The survey platform posts each completed response (signed as a Standard
Webhooks sender, or with an ingest key); every respondent is screened on arrival and the flags
are stored with readable evidence. Analysts find flagged respondents, read the evidence and
record a review decision.

**A flag is evidence for a human decision about a respondent, not a verdict.**

Every error is an RFC 9457 problem document (`application/problem+json`).
"""


def _version() -> str:
    try:
        return version("heedful")
    except PackageNotFoundError:
        return "0.0.0"


def create_app(settings: Settings | None = None, *, migrate: bool = True) -> FastAPI:
    """The application, with its schema brought up to date first (unless ``migrate`` is False)."""
    settings = settings or get_settings()
    engine = make_engine(settings.database_url)
    if migrate:
        upgrade(engine)
    database = Database(engine)
    database.checkpoint_in_background()
    ingest_queue = IngestQueue(database, settings)
    app_metrics = Metrics()
    job_queue = JobQueue(database, settings, app_metrics)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        job_queue.consume(settings.job_workers)
        yield
        job_queue.close()
        ingest_queue.close()
        database.dispose()

    app = FastAPI(
        title="Heedful",
        version=_version(),
        description=DESCRIPTION,
        lifespan=lifespan,
        openapi_tags=[
            {"name": "surveys", "description": "Register instruments; secrets; re-screening."},
            {"name": "responses", "description": "Post completed responses (webhook)."},
            {"name": "respondents", "description": "Find, read, review and erase respondents."},
            {"name": "reports", "description": "Screening reports for analysts (HTML)."},
            {"name": "exports", "description": "The survey as one file: CSV, Parquet, SPSS, Stata."},
            {"name": "jobs", "description": "Re-screens, reports and exports as background jobs."},
            {"name": "detectors", "description": "What each detector measures."},
            {"name": "health", "description": "Liveness and readiness, without a key."},
        ],
    )
    app.state.settings = settings
    app.state.database = database
    app.state.ingest_queue = ingest_queue
    app.state.limits = Limits(settings)
    app.state.metrics = app_metrics
    app.state.job_queue = job_queue
    app.state.metrics.watch_queue(ingest_queue.depth)
    problems.install(app)
    # Added last, so outermost: the request id reaches every reply and log line, failures too.
    app.add_middleware(RequestContext, metrics=app.state.metrics)
    for module in (
        health, surveys, responses, respondents, reports, exports, jobs, detectors, metrics
    ):
        app.include_router(module.router)
    review_pages.install(app)
    app.openapi = lambda: _openapi(app)  # type: ignore[method-assign]
    return app


def prepare_process() -> None:
    """Before serving: keep the collector away from the long-lived start-up objects.

    The libraries loaded at start (numpy, scipy, pandas, SQLAlchemy, pydantic) leave a heap of
    a few million objects that live as long as the process; a full collection walks all of them
    (about 0.2 s here) and stalls every request waiting at that moment. Freezing them takes them
    out of every later collection; a larger first-generation threshold makes the young
    collections rarer (requests make many short-lived objects).
    """
    for name in SCREENING_MODULES:
        importlib.import_module(name)
    gc.collect()
    gc.freeze()
    gc.set_threshold(20_000, 20, 20)


def _openapi(app: FastAPI) -> dict[str, Any]:
    if app.openapi_schema is None:
        document = get_openapi(
            title=app.title,
            version=app.version,
            description=app.description,
            routes=app.routes,
            tags=app.openapi_tags,
        )
        schemas = document.setdefault("components", {}).setdefault("schemas", {})
        schemas.update(surveys.instrument_schema())
        from .schemas import BatchIn, ResponseIn

        for name, model in (("Problem", ProblemOut), ("ResponseIn", ResponseIn),
                            ("BatchIn", BatchIn)):
            schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
            # The schemas it refers to (a problem's field errors) become components too.
            for inner, definition in schema.pop("$defs", {}).items():
                schemas.setdefault(inner, definition)
            schemas[name] = schema
        document["components"]["securitySchemes"] = {
            "apiKey": {"type": "http", "scheme": "bearer", "description": "heedful keys create"}
        }
        document["security"] = [{"apiKey": []}]
        # Every 422 is a problem document, like every other error; any operation can fail.
        for operations in document["paths"].values():
            for operation in operations.values():
                entry = operation.get("responses", {}).get("422")
                if entry is not None and "HTTPValidationError" in json.dumps(entry):
                    operation["responses"]["422"] = _problem_entry("Invalid input")
                operation["responses"].setdefault(
                    "500", _problem_entry("The server failed; nothing was stored")
                )
        # A body that is not JSON is refused with 400 wherever a body is read.
        for operations in document["paths"].values():
            for operation in operations.values():
                if "requestBody" in operation:
                    operation["responses"].setdefault("400", _problem_entry("Malformed JSON"))
        for name in ("HTTPValidationError", "ValidationError"):
            schemas.pop(name, None)
        for path in ("/healthz", "/readyz"):
            for operation in document["paths"].get(path, {}).values():
                operation["security"] = []
        app.openapi_schema = document
    return app.openapi_schema


def _problem_entry(description: str) -> dict[str, Any]:
    return {
        "description": description,
        "content": {
            problems.PROBLEM_JSON: {"schema": {"$ref": "#/components/schemas/Problem"}}
        },
    }


def openapi_document() -> dict[str, Any]:
    """The OpenAPI document, built without touching any database."""
    app = create_app(Settings(database_url="sqlite://"), migrate=False)
    return app.openapi()
