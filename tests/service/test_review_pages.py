"""The review pages over HTTP (the browser tests in tests/browser drive the same pages in
Chromium): sessions, form tokens, the queue's filters, one respondent's page, and decisions
that the analyst API reads back (and the other way round)."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from sqlalchemy import update

from service import store
from service.models import WebSession
from service.pages.routes import PREFIX, SESSION_COOKIE, SIGN_IN_COOKIE

from .conftest import random_rows, respondent

FORM_TOKEN = re.compile(r'name="form_token" value="([^"]+)"')


def sign_in(client, key: str, next_path: str = ""):
    """The sign-in page's form token, then the form posted with ``key``."""
    page = client.get(f"{PREFIX}/sign-in")
    assert page.status_code == 200
    token = FORM_TOKEN.search(page.text).group(1)
    return client.post(
        f"{PREFIX}/sign-in", data={"key": key, "form_token": token, "next": next_path},
        follow_redirects=False,
    )


def form_token(page_text: str) -> str:
    return FORM_TOKEN.search(page_text).group(1)


@pytest.fixture
def filled(service, survey):
    """The survey with 30 random respondents and three that give one answer throughout."""
    rows = random_rows(30, seed=3)
    rows += [respondent(f"same{i}", [3] * 8) for i in range(3)]
    reply = service.client.post(
        f"/v1/surveys/{survey['survey']}/responses", json={"responses": rows},
        headers=service.auth(service.ingest),
    )
    assert reply.status_code == 201, reply.status_code
    return survey["survey"]


def test_pages_need_a_session_and_send_to_sign_in(service, filled):
    reply = service.client.get(f"{PREFIX}/surveys/{filled}", follow_redirects=False)
    assert reply.status_code == 303
    assert reply.headers["location"].startswith(f"{PREFIX}/sign-in?next=")


def test_an_analyst_key_signs_in_with_a_strict_http_only_cookie(service, filled):
    reply = sign_in(service.client, service.analyst, f"{PREFIX}/surveys/{filled}")
    assert reply.status_code == 303
    assert reply.headers["location"] == f"{PREFIX}/surveys/{filled}"
    cookie = next(
        c for c in reply.headers.get_list("set-cookie") if c.startswith(SESSION_COOKIE + "=")
    )
    assert "HttpOnly" in cookie and "SameSite=strict" in cookie and f"Path={PREFIX}" in cookie
    assert "Secure" not in cookie  # plain http here; https pages get Secure
    page = service.client.get(f"{PREFIX}/surveys")
    assert page.status_code == 200
    assert filled in page.text and "analyst-key" in page.text
    assert "evidence for a human decision" in page.text
    assert page.headers["cache-control"] == "no-store"
    assert "frame-ancestors 'none'" in page.headers["content-security-policy"]


def test_a_secure_cookie_over_tls(service, filled):
    client = service.client
    client.base_url = client.base_url.copy_with(scheme="https")
    reply = sign_in(client, service.analyst)
    cookie = next(
        c for c in reply.headers.get_list("set-cookie") if c.startswith(SESSION_COOKIE + "=")
    )
    assert "Secure" in cookie


@pytest.mark.parametrize("key,status,words", [
    ("hf_000000000000_wrong", 401, "not valid"),
    ("not a key", 401, "not valid"),
    ("ingest", 403, "only analyst keys"),
])
def test_wrong_and_ingest_keys_are_refused(service, filled, key, status, words):
    key = service.ingest if key == "ingest" else key
    reply = sign_in(service.client, key)
    assert reply.status_code == status
    assert words in reply.text
    assert SESSION_COOKIE not in service.client.cookies
    assert service.client.get(f"{PREFIX}/surveys", follow_redirects=False).status_code == 303


def test_sign_in_without_its_form_token_is_refused(service, filled):
    service.client.get(f"{PREFIX}/sign-in")
    reply = service.client.post(
        f"{PREFIX}/sign-in", data={"key": service.analyst, "form_token": "forged"},
        follow_redirects=False,
    )
    assert reply.status_code == 403
    assert SESSION_COOKIE not in service.client.cookies


def test_a_decision_without_the_form_token_is_refused_and_nothing_is_recorded(service, filled):
    sign_in(service.client, service.analyst)
    reply = service.client.post(
        f"{PREFIX}/surveys/{filled}/respondents/same0",
        data={"decision": "exclude", "note": "forged", "form_token": "guess"},
        follow_redirects=False,
    )
    assert reply.status_code == 403
    detail = service.client.get(
        f"/v1/surveys/{filled}/respondents/same0", headers=service.auth(service.analyst)
    ).json()
    assert detail["reviews"] == [] and detail["review_decision"] is None


def test_decision_on_the_page_is_the_api_s_and_the_api_s_is_on_the_page(service, filled):
    client = service.client
    sign_in(client, service.analyst)
    queue = client.get(f"{PREFIX}/surveys/{filled}")
    assert queue.status_code == 200
    assert "same0" in queue.text
    page = client.get(f"{PREFIX}/surveys/{filled}/respondents/same0")
    assert page.status_code == 200
    assert "<svg" in page.text and "same answer" in page.text
    reply = client.post(
        f"{PREFIX}/surveys/{filled}/respondents/same0",
        data={"decision": "exclude", "note": "one answer <throughout>",
              "form_token": form_token(page.text), "queue": ""},
        follow_redirects=False,
    )
    assert reply.status_code == 303
    assert "recorded=same0" in reply.headers["location"]
    detail = client.get(
        f"/v1/surveys/{filled}/respondents/same0", headers=service.auth(service.analyst)
    ).json()
    assert detail["review_decision"] == "exclude"
    assert detail["reviews"][-1]["reviewer"] == "analyst-key"
    assert detail["reviews"][-1]["note"] == "one answer <throughout>"
    # One recorded through the API shows on the page, escaped.
    client.post(
        f"/v1/surveys/{filled}/respondents/same1/review",
        json={"decision": "keep", "note": "<b>read it</b>"}, headers=service.auth(service.admin),
    )
    page = client.get(f"{PREFIX}/surveys/{filled}/respondents/same1")
    assert "&lt;b&gt;read it&lt;/b&gt;" in page.text and "by admin-key" in page.text
    # Reviewed respondents leave the default queue (not reviewed), and come back under "any".
    queue = client.get(f"{PREFIX}/surveys/{filled}").text
    assert "same0" not in queue and "same1" not in queue and "same2" in queue
    assert "same0" in client.get(f"{PREFIX}/surveys/{filled}?review=exclude").text


def test_queue_filters_and_a_bad_filter_names_its_field(service, filled):
    sign_in(service.client, service.analyst)
    client = service.client
    by_detector = client.get(f"{PREFIX}/surveys/{filled}?detector=long_string&review=").text
    assert "same0" in by_detector
    shown = set(re.findall(r'class="respondent-link"[^>]*>([^<]+)<', by_detector))
    api = client.get(
        f"/v1/surveys/{filled}/respondents?detector=long_string&flagged=true&limit=1000",
        headers=service.auth(service.analyst),
    ).json()["data"]
    assert shown == {row["respondent_id"] for row in api}
    tomorrow = (dt.datetime.now(dt.UTC) + dt.timedelta(days=1)).date().isoformat()
    assert "same0" not in client.get(
        f"{PREFIX}/surveys/{filled}?received_from={tomorrow}"
    ).text
    bad = client.get(f"{PREFIX}/surveys/{filled}?received_from=soon")
    assert bad.status_code == 422 and "received from" in bad.text
    assert client.get(f"{PREFIX}/surveys/nosuch").status_code == 404
    assert client.get(f"{PREFIX}/surveys/{filled}/respondents/nobody").status_code == 404


def test_sign_out_ends_the_session(service, filled):
    client = service.client
    sign_in(client, service.analyst)
    page = client.get(f"{PREFIX}/surveys")
    token = client.cookies[SESSION_COOKIE]
    client.post(f"{PREFIX}/sign-out", data={"form_token": form_token(page.text)})
    client.cookies.set(SESSION_COOKIE, token, path=PREFIX)  # the old cookie, kept by someone
    assert client.get(f"{PREFIX}/surveys", follow_redirects=False).status_code == 303


def test_expired_sessions_and_revoked_keys_end(service, filled):
    client = service.client
    sign_in(client, service.analyst)
    assert client.get(f"{PREFIX}/surveys").status_code == 200
    with service.database.write() as session:
        session.execute(
            update(WebSession).values(expires_at=dt.datetime.now(dt.UTC) - dt.timedelta(1))
        )
    assert client.get(f"{PREFIX}/surveys", follow_redirects=False).status_code == 303
    sign_in(client, service.analyst)
    assert client.get(f"{PREFIX}/surveys").status_code == 200
    with service.database.write() as session:
        store.revoke_key(session, "analyst-key")
    assert client.get(f"{PREFIX}/surveys", follow_redirects=False).status_code == 303


def test_a_session_cookie_opens_no_api_operation(service, filled):
    client = service.client
    sign_in(client, service.admin)  # even an admin's session
    cookie = client.cookies[SESSION_COOKIE]
    for method, path in [
        ("DELETE", f"/v1/surveys/{filled}/respondents/same0"),
        ("GET", f"/v1/surveys/{filled}/respondents"),
        ("POST", f"/v1/surveys/{filled}/webhook-secret"),
        ("POST", "/v1/surveys"),
    ]:
        # The cookie's path keeps browsers from sending it here; send it anyway.
        reply = client.request(method, path, headers={"Cookie": f"{SESSION_COOKIE}={cookie}"})
        assert reply.status_code == 401, (method, path, reply.text)


def test_sign_in_cookie_is_separate(service):
    page = service.client.get(f"{PREFIX}/sign-in")
    assert SIGN_IN_COOKIE in service.client.cookies
    assert form_token(page.text) == service.client.cookies[SIGN_IN_COOKIE]


def test_refusals_on_the_pages_are_logged_by_reason_without_the_key(service, filled, caplog):
    caplog.set_level("INFO", logger="heedful.service")
    sign_in(service.client, "hf_000000000000_secret-part")
    sign_in(service.client, service.ingest)
    reasons = [getattr(r, "reason", None) for r in caplog.records]
    assert "sign-in-refused:unknown-key" in reasons and "sign-in-refused:wrong-role" in reasons
    assert not any("secret-part" in r.getMessage() or service.ingest in r.getMessage()
                   for r in caplog.records)


def test_reviews_are_recorded_and_read_through_one_set_of_use_cases():
    """The pages and the API share service.review: no other module calls the store's review
    functions, and both edges call the use cases."""
    import ast
    from pathlib import Path

    root = Path(__file__).resolve().parents[2] / "service"
    callers: dict[str, set[str]] = {}
    for path in root.rglob("*.py"):
        tree = ast.parse(path.read_text(), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name):
                name = f"{node.value.id}.{node.attr}"
                callers.setdefault(name, set()).add(path.relative_to(root).as_posix())
    for function in ("add_review", "reviews_of", "list_respondents", "get_respondent"):
        assert callers.get(f"store.{function}", set()) <= {"review.py"}, function
    for edge in ("api/respondents.py", "pages/routes.py"):
        assert edge in callers.get("review_cases.record_review", set()) | callers.get(
            "review.record_review", set()
        ), edge
        assert edge in callers.get("review_cases.respondent_detail", set()) | callers.get(
            "review.respondent_detail", set()
        ) | callers.get("review.detail_of", set()), edge


def _numbers(text: str) -> list[int]:
    row = re.search(r'<th scope="row"><a href="[^"]+">pulse</a>.*?</tr>', text, re.S).group(0)
    return [int(n) for n in re.findall(r'<td class="num">(?:<strong>)?(\d+)', row)]


def test_survey_counts_add_up_and_follow_decisions_at_once(service, filled):
    client = service.client
    sign_in(client, service.analyst)
    before = _numbers(client.get(f"{PREFIX}/surveys").text)
    respondents, waiting, *rest = before
    by_verdict, by_review = rest[:4], rest[4:]
    assert respondents == 33 == sum(by_verdict) == sum(by_review)
    assert by_review == [0, 0, 0, 33]
    api = client.get(
        f"/v1/surveys/{filled}/respondents?flagged=true&limit=1000",
        headers=service.auth(service.analyst),
    ).json()["data"]
    assert waiting == len(api)
    page = client.get(f"{PREFIX}/surveys/{filled}/respondents/same0")
    client.post(
        f"{PREFIX}/surveys/{filled}/respondents/same0",
        data={"decision": "keep", "form_token": form_token(page.text)},
    )
    client.post(
        f"/v1/surveys/{filled}/respondents/same0/review", json={"decision": "exclude"},
        headers=service.auth(service.analyst),
    )
    after = _numbers(client.get(f"{PREFIX}/surveys").text)
    assert after[1] == waiting - 1
    assert after[6:] == [0, 1, 0, 32]  # keep, exclude, undecided, not reviewed


@pytest.mark.parametrize("note,words", [("x" * 5001, "at most 5000"), ("a\x00b", "note")])
def test_a_note_the_api_would_refuse_is_refused_on_the_page_too(service, filled, note, words):
    client = service.client
    sign_in(client, service.analyst)
    page = client.get(f"{PREFIX}/surveys/{filled}/respondents/same2")
    reply = client.post(
        f"{PREFIX}/surveys/{filled}/respondents/same2",
        data={"decision": "keep", "note": note, "form_token": form_token(page.text)},
        follow_redirects=False,
    )
    assert reply.status_code == 422 and words in reply.text
    detail = client.get(
        f"/v1/surveys/{filled}/respondents/same2", headers=service.auth(service.analyst)
    ).json()
    assert detail["reviews"] == []
