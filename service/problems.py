"""Every error as an RFC 9457 problem-details document (``application/problem+json``).

Routes raise :class:`Problem` (or let a library error through); the handlers installed by
:func:`install` turn each into::

    {"type": "/problems/invalid-responses", "title": "...", "status": 422, "detail": "...",
     "instance": "/v1/surveys/s1/responses", "errors": [{"pointer": "#/responses/3/answers/q07",
     "detail": "...", "row": 4, "respondent_id": "r4", "item": "q07"}]}

``errors`` is the field list of validation problems (RFC 9457 section 3's example member).
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from detectors import HeedfulError, InstrumentError, ResponseDataError, SettingError

from .errors import (
    CONFLICT_REASON,
    InvalidQuery,
    JobEnded,
    JobNotDone,
    NoVersion,
    RespondentConflict,
    ServiceError,
    SignatureRefused,
    TooManyRequests,
    UnknownJob,
    UnknownRespondent,
    UnknownSurvey,
    WebhookIdReused,
    WriterBusy,
)

__all__ = [
    "Problem", "install", "note_refusal", "PROBLEM_JSON", "problem_schema", "field_error", "from_service",
]

PROBLEM_JSON = "application/problem+json"
log = logging.getLogger("heedful.service")

_TITLES = {
    400: "Bad request",
    401: "Not authenticated",
    403: "Not allowed",
    404: "Not found",
    405: "Method not allowed",
    406: "Not acceptable",
    409: "Conflict",
    413: "Request body too large",
    415: "Unsupported media type",
    422: "Invalid input",
    429: "Too many requests",
    500: "Internal error",
    503: "Service unavailable",
}


class Problem(Exception):
    """An error answered with a problem-details document."""

    def __init__(
        self,
        status: int,
        detail: str,
        *,
        kind: str | None = None,
        title: str | None = None,
        errors: list[dict[str, Any]] | None = None,
        headers: dict[str, str] | None = None,
        **extensions: Any,
    ):
        self.status = status
        self.detail = detail
        self.kind = kind
        self.title = title or _TITLES.get(status, "Error")
        self.errors = errors
        self.headers = headers
        self.extensions = extensions
        #: Why, in a word, for the log and the metrics when the type alone does not say
        #: (which check refused a signature); never shown in the reply.
        self.cause: str | None = None
        #: For a server failure: where it was raised (file, line, function of each frame).
        self.frames: str | None = None
        super().__init__(detail)

    def document(self, instance: str) -> dict[str, Any]:
        body: dict[str, Any] = {
            "type": f"/problems/{self.kind}" if self.kind else "about:blank",
            "title": self.title,
            "status": self.status,
            "detail": self.detail,
            "instance": instance,
        }
        if self.errors is not None:
            body["errors"] = self.errors
        body.update(self.extensions)
        return body


def field_error(pointer: str, detail: str, **context: Any) -> dict[str, Any]:
    """One entry of a problem's ``errors`` list; ``pointer`` is a JSON pointer into the body."""
    return {"pointer": pointer, "detail": detail, **{k: v for k, v in context.items()}}


def _dotted_to_pointer(location: str) -> str:
    """'items[3].keyed' -> '#/items/3/keyed'."""
    if not location:
        return "#"
    parts = location.replace("[", ".").replace("]", "").split(".")
    return "#/" + "/".join(p.replace("~", "~0").replace("/", "~1") for p in parts if p)


def from_library(error: HeedfulError) -> Problem:
    """The one place where library errors become problems."""
    if isinstance(error, InstrumentError):
        return Problem(
            422,
            f"The instrument is invalid ({len(error.problems)} problem(s)).",
            kind="invalid-instrument",
            errors=[
                field_error(_dotted_to_pointer(p.location), p.message, location=p.location)
                for p in error.problems
            ],
        )
    if isinstance(error, ResponseDataError):
        errors = []
        for p in error.problems:
            entry = field_error(
                f"#/responses/{p.row - 1}" + (f"/answers/{p.column}" if p.column else "")
                if p.row is not None
                else "#",
                p.reason,
                row=p.row,
                respondent_id=p.respondent_id,
                item=p.column,
            )
            errors.append(entry)
        return Problem(
            422,
            f"{len(error.problems)} problem(s) in the responses; nothing was stored.",
            kind="invalid-responses",
            errors=errors,
        )
    if isinstance(error, SettingError):
        return Problem(
            422,
            str(error),
            kind="invalid-setting",
            errors=[field_error(f"#/screening/{error.detector}/{error.setting}", str(error))],
        )
    return Problem(422, str(error), kind="invalid-input")


def from_service(error: ServiceError) -> Problem:
    """The one place where the use cases' domain errors become problems."""
    if isinstance(error, UnknownSurvey):
        return Problem(404, str(error), kind="unknown-survey")
    if isinstance(error, UnknownRespondent):
        return Problem(404, str(error), kind="unknown-respondent")
    if isinstance(error, InvalidQuery):
        return Problem(
            422, str(error), kind="invalid-request",
            errors=[field_error(f"query:{error.field}", error.detail)],
        )
    if isinstance(error, NoVersion):
        return Problem(409, str(error), kind="no-version")
    if isinstance(error, RespondentConflict):
        return Problem(
            409,
            str(error),
            kind="respondent-conflict",
            errors=[
                field_error(
                    f"#/responses/{c.position}/respondent_id", CONFLICT_REASON,
                    row=c.row, respondent_id=c.respondent_id,
                )
                for c in error.conflicts
            ],
        )
    if isinstance(error, SignatureRefused):
        problem = Problem(401, str(error), kind="bad-signature")
        problem.cause = error.code
        return problem
    if isinstance(error, TooManyRequests):
        problem = Problem(
            429, str(error), kind="too-many-requests",
            headers={"Retry-After": str(error.retry_after)},
        )
        problem.cause = error.code
        return problem
    if isinstance(error, WriterBusy):
        return Problem(
            503, str(error), kind="writer-busy", headers={"Retry-After": str(error.retry_after)}
        )
    if isinstance(error, WebhookIdReused):
        return Problem(
            409, str(error), kind="webhook-id-reused",
            errors=[field_error("header:webhook-id", "already used for another body")],
        )
    if isinstance(error, UnknownJob):
        return Problem(404, str(error), kind="unknown-job")
    if isinstance(error, JobNotDone):
        return Problem(409, str(error), kind="job-not-done", state=error.state)
    if isinstance(error, JobEnded):
        return Problem(409, str(error), kind="job-ended", state=error.state)
    return Problem(422, str(error), kind="invalid-input")


def _respond(request: Request, problem: Problem) -> JSONResponse:
    _note(request, problem)
    return JSONResponse(
        problem.document(request.url.path),
        status_code=problem.status,
        media_type=PROBLEM_JSON,
        headers=problem.headers,
    )


def note_refusal(request: Request, status: int, kind: str, cause: str | None = None) -> None:
    """The log line and count of a refusal answered other than with a problem document (the
    review pages answer with a page)."""
    problem = Problem(status, kind, kind=kind)
    problem.cause = cause
    _note(request, problem)


def _note(request: Request, problem: Problem) -> None:
    """A log line and a count for every refusal or failure: the route template (never the
    path, which may name a respondent), the survey, the status and the reason, and for a server
    failure where it was raised; no body, detail, field or exception message."""
    reason = problem.kind or f"http-{problem.status}"
    if problem.cause:
        reason = f"{reason}:{problem.cause}"
    metrics = getattr(request.app.state, "metrics", None)
    if metrics is not None:
        metrics.refusals.labels(str(problem.status), reason).inc()
    route = getattr(request.scope.get("route"), "path_format", None) or _route_template(request)
    survey = request.scope.get("path_params", {}).get("survey")
    event = "failed" if problem.status >= 500 else "refused"
    log.log(
        logging.ERROR if problem.status >= 500 else logging.INFO,
        "%s %s %s on %s %s%s", event, problem.status, reason, request.method, route,
        f"\n{problem.frames}" if problem.frames else "",
        extra={
            "event": event, "method": request.method, "route": route,
            "survey": survey[:100] if isinstance(survey, str) else None,
            "status": problem.status, "reason": reason,
        },
    )


def _validation_pointer(loc: tuple[Any, ...] | list[Any]) -> str:
    parts = [str(p) for p in loc]
    if parts and parts[0] in ("body", "query", "path", "header"):
        source, parts = parts[0], parts[1:]
        if source != "body":
            return f"{source}:" + ".".join(parts)
    return "#/" + "/".join(parts) if parts else "#"


def install(app: FastAPI) -> None:
    """Register the handlers that answer every error with a problem document."""

    @app.exception_handler(Problem)
    async def _problem(request: Request, error: Problem) -> JSONResponse:
        return _respond(request, error)

    @app.exception_handler(ServiceError)
    async def _service(request: Request, error: ServiceError) -> JSONResponse:
        return _respond(request, from_service(error))

    @app.exception_handler(HeedfulError)
    async def _library(request: Request, error: HeedfulError) -> JSONResponse:
        return _respond(request, from_library(error))

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, error: RequestValidationError) -> JSONResponse:
        errors = [
            field_error(_validation_pointer(e["loc"]), e["msg"]) for e in error.errors()
        ]
        return _respond(
            request,
            Problem(422, f"{len(errors)} invalid field(s).", kind="invalid-request", errors=errors),
        )

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, error: StarletteHTTPException) -> JSONResponse:
        detail = error.detail if isinstance(error.detail, str) else _TITLES.get(error.status_code)
        headers = getattr(error, "headers", None)
        if error.status_code == 405:
            # The router names the methods of the first route matching the path only; a path
            # served by several routes (GET and DELETE of a respondent) allows all of theirs.
            headers = {**(headers or {}), "Allow": ", ".join(_allowed_methods(request))}
        return _respond(request, Problem(error.status_code, detail or "Error", headers=headers))

    app.add_middleware(ServerFailures)


class ServerFailures:
    """Answers an unexpected exception with a 500 problem and logs it without data.

    An exception handler would not do: Starlette passes the exception on to the server after
    the handler's reply, and the server logs its traceback with the messages of every exception
    in the chain (a database error's message holds the SQL parameters: respondent ids, answers,
    meta). Here the exception stops, and the log line holds the exception types, the route's
    path template (never the path, which can hold a respondent id) and the traceback's frames
    without any message.
    """

    def __init__(self, app: Any):
        self.app = app

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracked(message: Any) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, tracked)
        except Exception as error:
            request = Request(scope)
            if _database_unavailable(error):
                problem = Problem(
                    503, "The database is unavailable; nothing was stored. Try again shortly.",
                    kind="database-unavailable",
                    headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
                )
            else:
                problem = Problem(500, "The server failed; nothing was stored.")
                problem.frames = _frames(error)
            problem.cause = _chain(error)
            if started:  # the reply is cut short; nothing more can be said, but it is logged
                _note(request, problem)
            else:
                await _respond(request, problem)(scope, receive, send)


def _chain(error: BaseException) -> str:
    """The types of an exception and of those it was raised from, outermost first, each
    once."""
    names, seen = [], set()
    current: BaseException | None = error
    while current is not None and id(current) not in seen:
        seen.add(id(current))
        names.append(type(current).__name__)
        current = current.__cause__ or current.__context__
    return " from ".join(dict.fromkeys(names))


def _frames(error: BaseException) -> str:
    """Where the exception was raised: file, line and function of each frame, no messages, no
    source lines (a line can show a literal), no local values."""
    import traceback

    return "\n".join(
        f"  {frame.filename}:{frame.lineno} in {frame.name}"
        for frame in traceback.extract_tb(error.__traceback__)
    )


def _routes_matching(request: Request) -> list[Any]:
    """The routes of the app whose path template matches the request's path."""
    from fastapi.routing import iter_route_contexts
    from starlette.routing import compile_path

    found = []
    for route in iter_route_contexts(request.app.routes):
        if route.path is not None and compile_path(route.path)[0].match(request.url.path):
            found.append(route)
    return found


#: What a 503 asks the caller to wait before trying again.
RETRY_AFTER_SECONDS = 5


def _database_unavailable(error: BaseException) -> bool:
    """Whether the database could not be reached or is busy (as opposed to a bug or a broken
    schema): a connection refused or lost, a pool with no free connection, SQLite's file locked
    or unreadable. SQLite reports a missing table as an operational error too: that is a 500."""
    import sqlite3

    from sqlalchemy.exc import DBAPIError, OperationalError
    from sqlalchemy.exc import TimeoutError as PoolTimeout

    if isinstance(error, PoolTimeout):
        return True
    if not isinstance(error, DBAPIError):
        return False
    if error.connection_invalidated:
        return True
    if not isinstance(error, OperationalError):
        return False
    if isinstance(error.orig, sqlite3.OperationalError):
        text = str(error.orig).lower()
        return any(words in text for words in _SQLITE_UNAVAILABLE)
    return True


#: SQLite's operational errors that mean "not now" rather than "broken".
_SQLITE_UNAVAILABLE = ("database is locked", "unable to open database", "disk i/o error")


def _allowed_methods(request: Request) -> list[str]:
    """Every method some route of the app answers on the request's path."""
    return sorted({method for route in _routes_matching(request) for method in route.methods or ()})


def _route_template(request: Request) -> str:
    """The path template of the route serving the request (``.../respondents/{respondent}``)."""
    for route in _routes_matching(request):
        if request.method in (route.methods or ()):
            return str(route.path_format)
    return "(no route)"


def problem_schema() -> dict[str, Any]:
    """OpenAPI description of a problem document, for the responses tables of the routes."""
    return {
        "description": "Problem details (RFC 9457)",
        "content": {
            PROBLEM_JSON: {
                "schema": {"$ref": "#/components/schemas/Problem"},
            }
        },
    }
