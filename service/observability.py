"""Request ids, one JSON object per log line, and the request timings behind ``/metrics``.

Log lines never carry answers, meta or respondent ids: what a request did is logged as its
method, route template (``/v1/surveys/{survey}/responses``, not the path), survey id, status and,
for a refusal, the problem type. The database engine hides statement parameters
(``db.make_engine``), so a failing statement does not print respondents' data either.
"""

from __future__ import annotations

import itertools
import json
import logging
import os
import re
import time
from contextvars import ContextVar
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from starlette.types import ASGIApp, Message, Receive, Scope, Send

    from .metrics import Metrics

__all__ = [
    "REQUEST_ID_HEADER", "RequestContext", "JsonLines", "current_request_id", "log_config",
]

REQUEST_ID_HEADER = "x-request-id"
#: A caller's own request id is kept when it is short and plain; otherwise a new one is made.
_ACCEPTED_ID = re.compile(r"[A-Za-z0-9._:-]{1,64}")
access_log = logging.getLogger("heedful.access")
_request_id: ContextVar[str | None] = ContextVar("heedful_request_id", default=None)
#: New request ids: this process's random prefix and a counter (drawing random bytes for every
#: request costs more than the rest of the request's bookkeeping together).
_PROCESS = os.urandom(8).hex()
_counter = itertools.count(1)


def new_request_id() -> str:
    """A request id unique to this process and, through its random prefix, across processes."""
    return f"{_PROCESS}{next(_counter):016x}"
#: Fields of a log record that the JSON line carries when a call sets them (``extra=``).
_FIELDS = ("event", "request_id", "method", "route", "survey", "status", "reason", "outcome",
           "seconds", "kind", "job")


def current_request_id() -> str | None:
    return _request_id.get()


class RequestContext:
    """Pure ASGI middleware: a request id for every HTTP request (the caller's ``X-Request-Id``
    when it is plain, else a new one), echoed in the reply's headers and put on every log line
    written while the request runs; and the request's duration by route in the metrics."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        given = None
        for name, value in scope["headers"]:
            if name == b"x-request-id":
                given = value.decode("latin-1")
                break
        request_id = given if given and _ACCEPTED_ID.fullmatch(given) else new_request_id()
        token = _request_id.set(request_id)
        started = time.perf_counter()
        status = 500
        header = (REQUEST_ID_HEADER.encode(), request_id.encode())

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
                message["headers"] = [*message.get("headers", ()), header]
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            seconds = time.perf_counter() - started
            route = scope.get("route")
            template = getattr(route, "path_format", None) or "(unmatched)"
            method = scope.get("method", "")
            self.metrics.requests.labels(method, template, f"{status // 100}xx").observe(seconds)
            if access_log.isEnabledFor(logging.INFO):
                survey = scope.get("path_params", {}).get("survey")
                access_log.info(
                    "%s %s %s %.1f ms", method, template, status, seconds * 1000,
                    extra={
                        "event": "request", "method": method, "route": template,
                        "survey": survey[:100] if isinstance(survey, str) else None,
                        "status": status, "seconds": round(seconds, 6),
                    },
                )
            _request_id.reset(token)


class JsonLines(logging.Formatter):
    """One JSON object per line: time (UTC, ISO 8601), level, logger, message, the request id of
    the request being served, and the structured fields a call passed with ``extra=``."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None) or _request_id.get()
        if request_id:
            line["request_id"] = request_id
        for name in _FIELDS:
            value = getattr(record, name, None)
            if value is not None and name not in line:
                line[name] = value
        if record.exc_info and record.exc_info[0] is not None:
            # The exception's type only: a message or traceback may quote respondents' data.
            line["exception"] = record.exc_info[0].__name__
        return json.dumps(line, ensure_ascii=False, default=str)


def log_config(level: str, json_lines: bool = True, access: bool = False) -> dict[str, Any]:
    """``logging.config.dictConfig`` settings for ``heedful serve``: the service's and uvicorn's
    loggers through one handler on standard error, as JSON lines (or plain text). ``access``:
    a line per request (route template, status, time; never the path or the query, which may
    name a respondent); uvicorn's own access lines stay off."""
    formatter = (
        {"()": f"{__name__}.JsonLines"}
        if json_lines
        else {"format": "%(asctime)s %(levelname)s %(name)s %(message)s"}
    )
    loggers = {
        name: {"handlers": ["stderr"], "level": level.upper(), "propagate": False}
        for name in ("heedful", "uvicorn", "uvicorn.error")
    }
    loggers["heedful.access"] = {
        "handlers": ["stderr"], "level": "INFO" if access else "WARNING", "propagate": False
    }
    loggers["uvicorn.access"] = {"handlers": [], "level": "WARNING", "propagate": False}
    # The engine logs statements at info and rows at debug: kept at warning whatever the
    # service's level, so that no row of respondents' data is ever logged.
    loggers["sqlalchemy"] = {"handlers": ["stderr"], "level": "WARNING", "propagate": False}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"main": formatter},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler", "formatter": "main", "stream": "ext://sys.stderr"
            }
        },
        "loggers": loggers,
    }
