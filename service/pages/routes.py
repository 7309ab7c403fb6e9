"""The review pages: sign in with an analyst key, a queue per survey, one respondent at a time.

Server-rendered HTML (Jinja2, autoescaped) under ``/review``; a small script adds keyboard
shortcuts, and every page works without it. The pages read and write through the use cases of
:mod:`service.review`, as the analyst API does, so a decision recorded here is the one
``GET /v1/surveys/{survey}/respondents/{id}`` and the exports show, and the other way round.

Sessions (:mod:`service.web_sessions`) live in a cookie that is HttpOnly, SameSite=Strict and
Secure when the page is served over TLS; every form carries the session's form token (the
sign-in form a token of its own, in a short-lived cookie), and a post without the right one is
refused. The API never accepts the cookie: an analyst's session reaches the pages' actions
(reading, reviewing) and nothing else.
"""

from __future__ import annotations

import datetime as dt
import hmac
import secrets
from collections.abc import Mapping
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import parse_qsl, quote, urlencode

import jinja2
from fastapi import APIRouter, Depends, FastAPI, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates
from pydantic import ValidationError

from detectors import REGISTRY, Instrument

from .. import review, screeners, store, web_sessions
from ..api.common import EVIDENCE_NOTE
from ..api.deps import DatabaseDep, SettingsDep
from ..errors import InvalidQuery, ServiceError, SignInRefused
from ..models import Decision, Survey
from ..problems import from_service, note_refusal
from ..schemas import ReviewIn
from .drawing import answer_pattern_svg, highlights_from

__all__ = ["router", "install", "PREFIX", "SESSION_COOKIE", "QueueFilter"]

PREFIX = "/review"
SESSION_COOKIE = "heedful_review"
SIGN_IN_COOKIE = "heedful_sign_in"
#: Respondents per queue page.
QUEUE_PAGE = 25

_HERE = Path(__file__).parent
templates = Jinja2Templates(
    env=jinja2.Environment(
        loader=jinja2.FileSystemLoader(_HERE / "templates"), autoescape=True,
        undefined=jinja2.StrictUndefined,
    )
)
templates.env.globals.update(PREFIX=PREFIX, CAUTION=EVIDENCE_NOTE)

router = APIRouter(prefix=PREFIX, include_in_schema=False)

#: Headers of every page: no caching of pages that show respondents, no framing, only the
#: service's own scripts and styles.
PAGE_HEADERS = {
    "Cache-Control": "no-store",
    "Content-Security-Policy": (
        "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
        "form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
    ),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",
}

VERDICT_WORDS = {
    "ok": "ok",
    "review": "review",
    "likely_careless": "likely careless",
    "not_screened": "not screened",
}
DECISION_WORDS = {
    "keep": "keep",
    "exclude": "exclude",
    "undecided": "undecided",
    "none": "not reviewed",
    "not_reviewed": "not reviewed",
}
SORT_WORDS = {
    "-careless_score": "careless score, highest first",
    "-flag_count": "flag count, most first",
    "-received_at": "arrival, newest first",
    "received_at": "arrival, oldest first",
    "respondent_id": "respondent id",
}


class SignInNeeded(Exception):
    """A page asked for without a session: answered with a redirect to the sign-in page."""

    def __init__(self, next_path: str):
        self.next_path = next_path


def _render(
    request: Request, template: str, status: int = 200, **context: Any
) -> HTMLResponse:
    response = templates.TemplateResponse(
        request, template, {"verdict_words": VERDICT_WORDS, "decision_words": DECISION_WORDS,
                            **context},
        status_code=status,
    )
    response.headers.update(PAGE_HEADERS)
    return response


def _error_page(
    request: Request, error: ServiceError, who: web_sessions.ActiveSession | None
) -> HTMLResponse:
    problem = from_service(error)
    note_refusal(request, problem.status, problem.kind or f"http-{problem.status}", problem.cause)
    return _render(
        request, "error.html", status=problem.status, who=who, title=problem.title,
        message=problem.detail,
    )


def _next_path(request: Request) -> str:
    query = request.url.query
    return request.url.path + (f"?{query}" if query else "")


def signed_in(request: Request, database: DatabaseDep) -> web_sessions.ActiveSession:
    """The page's session, or a redirect to the sign-in page."""
    with database.read() as session:
        who = web_sessions.session_of(session, request.cookies.get(SESSION_COOKIE))
    if who is None:
        raise SignInNeeded(_next_path(request))
    return who


Who = Annotated[web_sessions.ActiveSession, Depends(signed_in)]


def _check_form(expected: str, given: str) -> bool:
    return bool(given) and hmac.compare_digest(expected.encode(), given.encode())


def _refused_form(request: Request, who: web_sessions.ActiveSession | None) -> HTMLResponse:
    note_refusal(request, 403, "form-token-refused")
    return _render(
        request, "error.html", status=403, who=who, title="Form refused",
        message="This form did not come from a page of this session (or the session has "
        "changed since it was shown). Nothing was recorded; reload the page and try again.",
    )


def _safe_next(value: str | None) -> str:
    """A redirect target after signing in: a path of the pages, never another site."""
    if value and value.startswith(PREFIX + "/") and not value.startswith("//") and "\\" not in value:
        return value
    return f"{PREFIX}/surveys"


# Sign in and out ---------------------------------------------------------------------------------


@router.get("", response_class=HTMLResponse)
def start(request: Request, database: DatabaseDep) -> Response:
    with database.read() as session:
        who = web_sessions.session_of(session, request.cookies.get(SESSION_COOKIE))
    return RedirectResponse(f"{PREFIX}/surveys" if who else f"{PREFIX}/sign-in", status_code=303)


def _sign_in_page(
    request: Request, status: int = 200, message: str | None = None, next_path: str = ""
) -> HTMLResponse:
    token = secrets.token_urlsafe(32)
    response = _render(
        request, "sign_in.html", status=status, who=None, form_token=token, message=message,
        next_path=_safe_next(next_path),
    )
    response.set_cookie(
        SIGN_IN_COOKIE, token, max_age=900, path=PREFIX, httponly=True, samesite="strict",
        secure=request.url.scheme == "https",
    )
    return response


@router.get("/sign-in", response_class=HTMLResponse)
def sign_in_form(request: Request, next: str = "") -> HTMLResponse:  # noqa: A002
    return _sign_in_page(request, next_path=next)


@router.post("/sign-in", response_class=HTMLResponse)
def sign_in(
    request: Request,
    database: DatabaseDep,
    settings: SettingsDep,
    key: Annotated[str, Form()] = "",
    form_token: Annotated[str, Form()] = "",
    next: Annotated[str, Form()] = "",  # noqa: A002
) -> Response:
    if not _check_form(request.cookies.get(SIGN_IN_COOKIE, ""), form_token):
        note_refusal(request, 403, "form-token-refused", "sign-in")
        return _sign_in_page(
            request, 403, "The sign-in form had expired or did not come from this page; "
            "nothing was checked. Please enter the key again.", next,
        )
    limits = request.app.state.limits
    address = request.client.host if request.client else None
    try:
        limits.check_address(address)
        if not key.strip():
            return _sign_in_page(request, 422, "Enter an analyst key.", next)
        with database.write() as session:
            opened = web_sessions.sign_in(session, key, settings.review_session_minutes)
    except SignInRefused as refused:
        status = 401 if refused.code == "unknown-key" else 403
        if refused.code == "unknown-key":
            limits.failed(address)
        note_refusal(request, status, "sign-in-refused", refused.code)
        return _sign_in_page(request, status, str(refused), next)
    except ServiceError as error:  # too many failed keys from this address
        problem = from_service(error)
        note_refusal(request, problem.status, problem.kind or "refused", problem.cause)
        return _sign_in_page(request, problem.status, str(error), next)
    response = RedirectResponse(_safe_next(next), status_code=303)
    response.set_cookie(
        SESSION_COOKIE, opened.token, expires=opened.expires_at, path=PREFIX, httponly=True,
        samesite="strict", secure=request.url.scheme == "https",
    )
    response.delete_cookie(SIGN_IN_COOKIE, path=PREFIX)
    return response


@router.post("/sign-out", response_class=HTMLResponse)
def sign_out(
    request: Request, who: Who, database: DatabaseDep,
    form_token: Annotated[str, Form()] = "",
) -> Response:
    if not _check_form(who.form_token, form_token):
        return _refused_form(request, who)
    with database.write() as session:
        web_sessions.sign_out(session, request.cookies.get(SESSION_COOKIE))
    response = RedirectResponse(f"{PREFIX}/sign-in", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path=PREFIX)
    return response


# Surveys -----------------------------------------------------------------------------------------


@router.get("/surveys", response_class=HTMLResponse)
def surveys_page(request: Request, who: Who, database: DatabaseDep) -> HTMLResponse:
    with database.read() as session:
        tallies = review.survey_tallies(session)
    return _render(request, "surveys.html", who=who, tallies=tallies)


# The queue ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class QueueFilter:
    """A survey's queue as the page's query string gives it (every field a string)."""

    show: str = "flagged"  # flagged or all
    verdict: str = ""  # "", ok, review, likely_careless
    detector: str = ""
    review: str = "none"  # "", none, keep, exclude, undecided
    received_from: str = ""  # YYYY-MM-DD, first day included
    received_to: str = ""  # YYYY-MM-DD, last day included
    sort: str = ""  # "" = careless score where the survey has them, else flag count

    @classmethod
    def from_pairs(cls, given: Mapping[str, str]) -> QueueFilter:
        """The filter of a query string's pairs (other names are ignored)."""
        return cls(**{f.name: given[f.name].strip() for f in fields(cls) if f.name in given})

    @classmethod
    def from_request(cls, request: Request) -> QueueFilter:
        return cls.from_pairs(request.query_params)

    @classmethod
    def from_text(cls, text: str) -> QueueFilter:
        return cls.from_pairs(dict(parse_qsl(text)))

    def query_string(self) -> str:
        """The filter as a query string (only what differs from the defaults)."""
        pairs = [
            (f.name, getattr(self, f.name)) for f in fields(self)
            if getattr(self, f.name) != f.default
        ]
        return urlencode(pairs)

    def _day(self, field: str) -> dt.date | None:
        text = getattr(self, field)
        if not text:
            return None
        try:
            return dt.date.fromisoformat(text)
        except ValueError:
            raise InvalidQuery(
                field, "not a date", f"{field.replace('_', ' ')}: {text!r} is not a date "
                "(YYYY-MM-DD).",
            ) from None

    def list_query(self, default_sort: str, cursor: str | None = None) -> store.ListQuery:
        """The listing this filter asks for (domain errors name the field at fault)."""
        if self.show not in ("flagged", "all"):
            raise InvalidQuery("show", "flagged or all", f"show: {self.show!r} is not one of "
                               "flagged, all.")
        if self.verdict not in ("", "ok", "review", "likely_careless"):
            raise InvalidQuery("verdict", "unknown verdict",
                               f"verdict: {self.verdict!r} is not a verdict.")
        if self.review not in ("", "none", "keep", "exclude", "undecided"):
            raise InvalidQuery("review", "unknown review state",
                               f"review: {self.review!r} is not a review state.")
        if self.sort and self.sort not in SORT_WORDS:
            raise InvalidQuery("sort", "unknown sort", f"sort: {self.sort!r} is not offered.")
        first, last = self._day("received_from"), self._day("received_to")
        if first and last and last < first:
            raise InvalidQuery("received_to", "before the first day",
                               "received to: the last day is before the first day.")
        return store.ListQuery(
            flagged=True if self.show == "flagged" else None,
            detector=self.detector or None,
            review=self.review or None,
            verdict=self.verdict or None,
            received_after=_midnight(first) if first else None,
            received_before=_midnight(last + dt.timedelta(days=1)) if last else None,
            sort=self.sort or default_sort,
            limit=QUEUE_PAGE,
            cursor=cursor,
        )


def _midnight(day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(), tzinfo=dt.UTC)


def _default_sort(session: Any, found_survey: Survey) -> str:
    """The queue's order unless one is chosen: careless score where the survey has them."""
    if review.has_careless_scores(session, found_survey):
        return "-careless_score"
    return "-flag_count"


@router.get("/surveys/{survey}", response_class=HTMLResponse)
def queue_page(
    request: Request, survey: str, who: Who, database: DatabaseDep, cursor: str | None = None
) -> HTMLResponse:
    chosen = QueueFilter.from_request(request)
    problem = None
    page = None
    with database.read() as session:
        try:
            found_survey = review.find_survey(session, survey)
            default_sort = _default_sort(session, found_survey)
            tally = review.survey_tallies(session, found_survey)[0]
            try:
                query = chosen.list_query(default_sort, cursor)
                page = review.respondents_page(session, survey, query)
            except InvalidQuery as error:
                problem = error
        except ServiceError as error:
            return _error_page(request, error, who)
    return _render(
        request, "queue.html", status=422 if problem else 200, who=who, survey=survey,
        tally=tally, chosen=chosen, page=page, problem=problem,
        sort_used=chosen.sort or default_sort, sort_words=SORT_WORDS,
        detectors=list(REGISTRY), queue=chosen.query_string(), cursor=cursor,
    )


# One respondent ----------------------------------------------------------------------------------


def _respondent_context(
    session: Any, survey: str, respondent: str, chosen: QueueFilter
) -> dict[str, Any]:
    found_survey = review.find_survey(session, survey)
    found = review.find_respondent(session, found_survey, respondent)
    detail = review.detail_of(session, found_survey, found)
    instrument: Instrument = screeners.screener_for(session, found.survey_version_id).instrument
    highlights = highlights_from(detail.results, instrument)
    drawing = answer_pattern_svg(
        instrument, detail.answers, highlights,
        title=f"Answers of respondent {respondent} in the order they were asked",
    )
    try:
        previous, following = review.neighbours(
            session, found_survey, found, chosen.list_query(_default_sort(session, found_survey))
        )
    except InvalidQuery:
        previous, following = None, None
    items = [
        {
            "id": item.id, "text": item.text, "scale": item.scale, "block": item.block,
            "keyed": item.keyed, "answer": detail.answers.get(item.id),
            "label": _answer_label(instrument, item, detail.answers.get(item.id)),
        }
        for item in instrument.items
    ]
    flagged = [r for r in detail.results if r.flagged]
    return {
        "detail": detail, "drawing": drawing, "previous": previous, "following": following,
        "items": items, "flagged": flagged, "highlights": highlights,
    }


def _answer_label(instrument: Instrument, item: Any, answer: int | None) -> str:
    if answer is None:
        return "no answer"
    form = item.response_format or instrument.response_format
    if form.labels and 0 <= answer - form.lowest < len(form.labels):
        return f"{answer} ({form.labels[answer - form.lowest]})"
    return str(answer)


def _respondent_page(
    request: Request, survey: str, respondent: str, who: web_sessions.ActiveSession,
    database: Any, chosen: QueueFilter, status: int = 200, message: str | None = None,
    recorded: str | None = None,
) -> HTMLResponse:
    with database.read() as session:
        try:
            context = _respondent_context(session, survey, respondent, chosen)
        except ServiceError as error:
            return _error_page(request, error, who)
    return _render(
        request, "respondent.html", status=status, who=who, survey=survey,
        respondent=respondent, queue=chosen.query_string(), message=message,
        recorded=recorded, **context,
    )


def respondent_path(survey: str, respondent: str, queue: str = "") -> str:
    """The page of a respondent (``queue``: the queue's filter as a query string)."""
    path = f"{PREFIX}/surveys/{quote(survey, safe='')}/respondents/{quote(respondent, safe='/')}"
    return path + (f"?{queue}" if queue else "")


templates.env.globals.update(respondent_path=respondent_path)


@router.get("/surveys/{survey}/respondents/{respondent:path}", response_class=HTMLResponse)
def respondent_page(
    request: Request, survey: str, respondent: str, who: Who, database: DatabaseDep,
    recorded: str | None = None,
) -> HTMLResponse:
    chosen = QueueFilter.from_request(request)
    return _respondent_page(
        request, survey, respondent, who, database, chosen, recorded=recorded
    )


@router.post("/surveys/{survey}/respondents/{respondent:path}", response_class=HTMLResponse)
def record_decision(
    request: Request,
    survey: str,
    respondent: str,
    who: Who,
    database: DatabaseDep,
    form_token: Annotated[str, Form()] = "",
    decision: Annotated[str, Form()] = "",
    note: Annotated[str, Form()] = "",
    queue: Annotated[str, Form()] = "",
) -> Response:
    if not _check_form(who.form_token, form_token):
        return _refused_form(request, who)
    chosen = QueueFilter.from_text(queue)
    if decision not in {d.value for d in Decision}:
        return _respondent_page(
            request, survey, respondent, who, database, chosen, status=422,
            message="Choose a decision (keep, exclude or undecided) before recording.",
        )
    try:  # the API's rules for a review, in one place
        checked = ReviewIn.model_validate({"decision": decision, "note": note})
    except ValidationError as error:
        first = error.errors()[0]
        return _respondent_page(
            request, survey, respondent, who, database, chosen, status=422,
            message=f"The {first['loc'][-1]} was not recorded: {first['msg']}.",
        )
    with database.write() as session:
        try:
            review.record_review(
                session, survey, respondent, Decision(checked.decision), checked.note, who.name
            )
            found_survey = review.find_survey(session, survey)
            found = review.find_respondent(session, found_survey, respondent)
        except ServiceError as error:
            return _error_page(request, error, who)
        try:
            query = chosen.list_query(_default_sort(session, found_survey))
            _, following = review.neighbours(session, found_survey, found, query)
        except InvalidQuery:
            following = None
    queue_text = chosen.query_string()
    recorded = urlencode([("recorded", respondent)])
    if following is not None:
        target = respondent_path(survey, following, "&".join(p for p in (queue_text, recorded) if p))
    else:
        target = f"{PREFIX}/surveys/{survey}?" + "&".join(p for p in (queue_text, recorded) if p)
    return RedirectResponse(target, status_code=303)


def install(app: FastAPI) -> None:
    """Add the pages, their static files and the sign-in redirect to ``app``."""
    app.include_router(router)
    app.mount(f"{PREFIX}/static", StaticFiles(directory=str(_HERE / "static")), name="review-static")

    @app.exception_handler(SignInNeeded)
    async def _sign_in_first(request: Request, error: SignInNeeded) -> Response:
        target = f"{PREFIX}/sign-in?" + urlencode([("next", error.next_path)])
        return RedirectResponse(target, status_code=303)
