"""The review pages in a real browser: an analyst signs in, filters the queue, reads a
respondent and records decisions with the keyboard; the API and the export read them back.

One demo service and browser per test process; each test signs in (or out) and opens the page it
needs itself, so the tests hold in any order and split over processes."""

from __future__ import annotations

import csv
import io

import pytest
from selenium.common.exceptions import NoSuchElementException, StaleElementReferenceException
from selenium.webdriver.common.by import By
from selenium.webdriver.common.keys import Keys
from selenium.webdriver.support import expected_conditions as ready
from selenium.webdriver.support.ui import Select, WebDriverWait

from .conftest import screenshot

pytestmark = pytest.mark.browser

WAIT = 30  # seconds; a loaded 2-core machine included


def wait_for(driver, condition):
    """``condition`` once it holds; a page being replaced meanwhile is waited out."""
    return WebDriverWait(
        driver, WAIT, ignored_exceptions=(StaleElementReferenceException, NoSuchElementException)
    ).until(condition)


def page_title_is(driver, words: str):
    wait_for(driver, lambda d: d.find_element(By.TAG_NAME, "h1").text.startswith(words))


def sign_in(driver, demo, key: str) -> None:
    driver.delete_all_cookies()
    driver.get(f"{demo.url}/review")
    wait_for(driver, ready.presence_of_element_located((By.ID, "key")))
    field = driver.find_element(By.ID, "key")
    field.clear()
    field.send_keys(key, Keys.ENTER)


def signed_in(driver, demo) -> None:
    """The analyst signed in (again, when a test before signed out or in as someone else)."""
    sign_in(driver, demo, demo.keys["analyst"])
    page_title_is(driver, "Surveys")


def open_queue(driver, demo, query: str = "") -> list[str]:
    """The survey's queue (``query``: its filters); the respondent ids it lists."""
    driver.get(f"{demo.url}/review/surveys/{demo.survey}" + (f"?{query}" if query else ""))
    page_title_is(driver, "Respondents to review")
    return queue_ids(driver)


def open_first(driver) -> str:
    """The queue's first respondent, opened with the keyboard (j, then Enter); its id."""
    driver.find_element(By.TAG_NAME, "body").send_keys("j")
    first = driver.switch_to.active_element
    assert first.get_attribute("class") == "respondent-link"
    respondent = first.text
    first.send_keys(Keys.ENTER)
    page_title_is(driver, f"Respondent {respondent}")
    return respondent


def test_pages_send_to_sign_in_and_refuse_a_wrong_key(browser, demo):
    browser.delete_all_cookies()
    browser.get(f"{demo.url}/review/surveys/{demo.survey}")
    page_title_is(browser, "Sign in")
    sign_in(browser, demo, "hf_000000000000_not-a-real-key")
    message = wait_for(browser, ready.presence_of_element_located((By.ID, "sign-in-message")))
    assert "not valid" in message.text
    assert browser.get_cookie("heedful_review") is None


def test_an_ingest_key_cannot_sign_in(browser, demo):
    sign_in(browser, demo, demo.keys["ingest"])
    message = wait_for(browser, ready.presence_of_element_located((By.ID, "sign-in-message")))
    assert "only analyst keys" in message.text
    assert browser.get_cookie("heedful_review") is None


def test_the_analyst_key_signs_in_and_sees_the_surveys(browser, demo):
    sign_in(browser, demo, demo.keys["analyst"])
    page_title_is(browser, "Surveys")
    cookie = browser.get_cookie("heedful_review")
    assert cookie["httpOnly"] and cookie["sameSite"] == "Strict"
    assert demo.survey in browser.find_element(By.TAG_NAME, "table").text
    assert "evidence" in browser.find_element(By.CLASS_NAME, "caution").text.lower()


def queue_ids(driver) -> list[str]:
    return [a.text for a in driver.find_elements(By.CLASS_NAME, "respondent-link")]


def test_the_queue_filters_by_verdict_and_detector(browser, demo, tmp_path):
    signed_in(browser, demo)
    browser.find_element(By.LINK_TEXT, demo.survey).click()
    page_title_is(browser, "Respondents to review")
    assert queue_ids(browser)
    Select(browser.find_element(By.ID, "f-verdict")).select_by_value("likely_careless")
    Select(browser.find_element(By.ID, "f-detector")).select_by_value("long_string")
    browser.find_element(By.CSS_SELECTOR, ".filters button[type=submit]").click()
    wait_for(browser, lambda d: "verdict=likely_careless" in d.current_url)
    shown = queue_ids(browser)
    with demo.api() as api:
        expected = api.get(
            f"/v1/surveys/{demo.survey}/respondents",
            params={"verdict": "likely_careless", "detector": "long_string", "flagged": "true",
                    "review": "none", "limit": 25, "sort": "-careless_score"},
        ).json()["data"]
    assert shown == [row["respondent_id"] for row in expected]
    assert shown
    browser.find_element(By.TAG_NAME, "body").send_keys("j")  # to the first respondent
    browser.switch_to.active_element.send_keys("j")  # j moves down the list, k back up
    assert browser.switch_to.active_element.text == shown[min(1, len(shown) - 1)]
    browser.switch_to.active_element.send_keys("k")
    assert browser.switch_to.active_element.text == shown[0]
    for cell in browser.find_elements(By.CSS_SELECTOR, "table.queue .verdict"):
        assert cell.text.endswith("likely careless")
    screenshot(browser, "review-queue", tmp_path)


def test_a_respondent_page_shows_the_pattern_and_the_evidence(browser, demo, tmp_path):
    signed_in(browser, demo)
    open_queue(browser, demo, "verdict=likely_careless&detector=long_string&review=")
    open_first(browser)
    drawing = browser.find_element(By.CSS_SELECTOR, ".pattern svg")
    assert drawing.get_attribute("role") == "img"
    assert drawing.size["height"] > 100
    results = browser.find_element(By.CSS_SELECTOR, "table.results").text
    assert "FLAGGED" in results and "long_string" in results
    screenshot(browser, "review-respondent", tmp_path)


def test_record_a_decision_with_the_keyboard_and_see_it_in_the_api_and_export(browser, demo):
    signed_in(browser, demo)
    open_queue(browser, demo, "verdict=likely_careless")
    respondent = open_first(browser)
    body = browser.find_element(By.TAG_NAME, "body")
    body.send_keys("x")  # exclude; the note takes the focus
    wait_for(browser, lambda d: d.switch_to.active_element.get_attribute("id") == "note")
    assert browser.find_element(By.ID, "decision-exclude").is_selected()
    note = browser.switch_to.active_element
    note.send_keys("Same answer down every page; read all four blocks.")
    note.send_keys(Keys.CONTROL, Keys.ENTER)
    status = wait_for(browser, ready.presence_of_element_located((By.CSS_SELECTOR, ".message.ok")))
    assert respondent in status.text
    assert browser.find_element(By.TAG_NAME, "h1").text != f"Respondent {respondent}"
    with demo.api() as api:
        detail = api.get(f"/v1/surveys/{demo.survey}/respondents/{respondent}").json()
        export = api.get(
            f"/v1/surveys/{demo.survey}/export", params={"format": "csv"},
            headers={"Accept": "text/csv"},
        )
    assert detail["review_decision"] == "exclude"
    assert detail["reviews"][-1]["reviewer"] == "demo-analyst"
    assert detail["reviews"][-1]["note"].startswith("Same answer down every page")
    rows = {row["respondent_id"]: row for row in csv.DictReader(io.StringIO(export.text))}
    assert rows[respondent]["review_decision"] == "exclude"


def test_keep_with_the_keyboard_and_move_through_the_queue(browser, demo):
    signed_in(browser, demo)
    open_queue(browser, demo, "verdict=review")
    current = open_first(browser)
    body = browser.find_element(By.TAG_NAME, "body")
    body.send_keys("k")
    note = browser.switch_to.active_element
    assert note.get_attribute("id") == "note"
    note.send_keys(Keys.ESCAPE)  # leave the note: the shortcuts work again
    browser.find_element(By.TAG_NAME, "body").send_keys("n")  # next, without recording
    wait_for(browser, lambda d: d.find_element(By.TAG_NAME, "h1").text != f"Respondent {current}")
    browser.find_element(By.TAG_NAME, "body").send_keys("p")
    page_title_is(browser, f"Respondent {current}")
    with demo.api() as api:
        detail = api.get(f"/v1/surveys/{demo.survey}/respondents/{current}").json()
    assert detail["review_decision"] is None  # choosing without recording records nothing


def test_a_decision_recorded_through_the_api_shows_on_the_page(browser, demo):
    signed_in(browser, demo)
    current = open_queue(browser, demo, "verdict=review")[1]
    browser.get(f"{demo.url}/review/surveys/{demo.survey}/respondents/{current}")
    with demo.api() as api:
        reply = api.post(
            f"/v1/surveys/{demo.survey}/respondents/{current}/review",
            json={"decision": "undecided", "note": "Asked a colleague <second opinion>."},
        )
        assert reply.status_code == 201
    browser.refresh()
    assert browser.find_element(By.ID, "latest-decision").text == "undecided"
    assert "Asked a colleague <second opinion>." in browser.find_element(By.ID, "reviews").text


def test_a_form_with_a_wrong_token_is_refused(browser, demo):
    signed_in(browser, demo)
    current = open_queue(browser, demo, "verdict=review")[2]
    browser.get(f"{demo.url}/review/surveys/{demo.survey}/respondents/{current}")
    browser.execute_script(
        "document.querySelector('#decision-form input[name=form_token]').value = 'forged';"
        "document.getElementById('decision-keep').checked = true;"
    )
    browser.find_element(By.ID, "record").send_keys(Keys.ENTER)
    page_title_is(browser, "Form refused")
    with demo.api() as api:
        detail = api.get(f"/v1/surveys/{demo.survey}/respondents/{current}").json()
    assert detail["review_decision"] is None  # nothing recorded


def test_an_analyst_session_reaches_no_admin_action(browser, demo):
    signed_in(browser, demo)
    # The pages' own policy lets no script fetch anything; a page of the same origin without it
    # (the health check's JSON) stands in for a script that tries to use the session.
    browser.get(f"{demo.url}/healthz")
    victim = queue_victim(demo)
    statuses = browser.execute_async_script(
        """
        const done = arguments[arguments.length - 1];
        const [survey, respondent] = [arguments[0], arguments[1]];
        Promise.all([
          fetch(`/v1/surveys/${survey}/respondents/${respondent}`,
                {method: 'DELETE', credentials: 'include'}),
          fetch(`/v1/surveys/${survey}/webhook-secret`, {method: 'POST', credentials: 'include'}),
          fetch('/v1/surveys', {method: 'POST', credentials: 'include',
                headers: {'Content-Type': 'application/json'}, body: '{}'}),
        ]).then(replies => done(replies.map(r => r.status)), error => done(String(error)));
        """,
        demo.survey, victim,
    )
    assert statuses == [401, 401, 401]
    with demo.api() as api:
        assert api.get(f"/v1/surveys/{demo.survey}/respondents/{victim}").status_code == 200
    # The pages themselves offer no erasure, key or survey administration.
    browser.get(f"{demo.url}/review/surveys/{demo.survey}/respondents/{victim}")
    page_title_is(browser, "Respondent")
    assert browser.find_elements(By.CSS_SELECTOR, "form[action*='erase'], form[action*='key']") == []


def queue_victim(demo) -> str:
    with demo.api() as api:
        return api.get(
            f"/v1/surveys/{demo.survey}/respondents", params={"limit": 1}
        ).json()["data"][0]["respondent_id"]


def relative_luminance(rgb: tuple[float, float, float]) -> float:
    """WCAG 2.x relative luminance of an sRGB colour (0-255 channels)."""
    def linear(channel: float) -> float:
        c = channel / 255
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (linear(c) for c in rgb)
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast(a: tuple[float, float, float], b: tuple[float, float, float]) -> float:
    light, dark = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (light + 0.05) / (dark + 0.05)


def test_contrast_formula_matches_the_published_extremes():
    # WCAG 2.2, "contrast ratio": black on white is 21:1, a colour on itself 1:1.
    assert contrast((0, 0, 0), (255, 255, 255)) == pytest.approx(21.0)
    assert contrast((118, 118, 118), (118, 118, 118)) == pytest.approx(1.0)
    # #767676 on white is the lightest grey that reaches 4.5:1 (common practice, no source).
    assert contrast((118, 118, 118), (255, 255, 255)) >= 4.5


def test_the_respondent_page_is_labelled_and_readable(browser, demo):
    signed_in(browser, demo)
    browser.get(f"{demo.url}/review/surveys/{demo.survey}/respondents/{queue_victim(demo)}")
    page_title_is(browser, "Respondent")
    assert browser.find_element(By.TAG_NAME, "html").get_attribute("lang") == "en"
    unlabelled = browser.execute_script(
        """
        return [...document.querySelectorAll('input:not([type=hidden]), select, textarea')]
          .filter(e => !(e.labels && e.labels.length) && !e.getAttribute('aria-label'))
          .map(e => e.name || e.id);
        """
    )
    assert unlabelled == []
    # Text against the background it is drawn on, for every element with text of its own.
    pairs = browser.execute_script(
        """
        const rgb = s => s.match(/[\\d.]+/g).slice(0, 4).map(Number);
        const background = e => {
          for (; e; e = e.parentElement) {
            const c = rgb(getComputedStyle(e).backgroundColor);
            if (c.length < 4 || c[3] > 0) return c.slice(0, 3);
          }
          return [255, 255, 255];
        };
        return [...document.querySelectorAll('body *')]
          .filter(e => [...e.childNodes].some(n => n.nodeType === 3 && n.textContent.trim()))
          .filter(e => e.getClientRects().length && !e.closest('svg'))
          .map(e => [e.tagName + '.' + e.className, rgb(getComputedStyle(e).color).slice(0, 3),
                     background(e)]);
        """
    )
    assert len(pairs) > 30
    low = [(what, fg, bg) for what, fg, bg in pairs if contrast(tuple(fg), tuple(bg)) < 4.5]
    assert low == []
    # Verdicts and flags are said in words, not by colour alone.
    assert browser.find_element(By.CSS_SELECTOR, ".verdict-card .verdict").text.strip()
    # The keyboard reaches the decision: the first radio and the note are in the tab order.
    for element_id in ("decision-keep", "note", "record"):
        assert browser.find_element(By.ID, element_id).get_attribute("tabindex") in (None, "0")


def test_sign_out_ends_the_session(browser, demo):
    signed_in(browser, demo)
    browser.find_element(By.CSS_SELECTOR, ".signed-in button").click()
    page_title_is(browser, "Sign in")
    browser.get(f"{demo.url}/review/surveys")
    page_title_is(browser, "Sign in")


def test_the_screening_report_renders_with_every_picture(browser, demo, tmp_path):
    with demo.api() as api:
        reply = api.get(f"/v1/surveys/{demo.survey}/report")
    assert reply.status_code == 200
    page = tmp_path / "report.html"
    page.write_bytes(reply.content)
    browser.get(page.as_uri())
    pictures = browser.execute_script(
        "return [...document.images].map(i => [i.complete, i.naturalWidth]);"
    )
    assert pictures and all(done and width > 0 for done, width in pictures)
    assert "not a verdict" in browser.find_element(By.TAG_NAME, "body").text
    screenshot(browser, "report", tmp_path)


def test_the_pages_reflow_in_a_narrow_window(browser, demo):
    """No page needs sideways scrolling in a narrow window; wide tables and the drawing scroll
    inside regions of their own (WCAG 2.2 "Reflow", approximated at the browser's narrowest
    window)."""
    signed_in(browser, demo)
    victim = queue_victim(demo)
    browser.set_window_size(500, 1000)
    try:
        for path in (
            "/review/surveys", f"/review/surveys/{demo.survey}?review=",
            f"/review/surveys/{demo.survey}/respondents/{victim}",
        ):
            browser.get(demo.url + path)
            wait_for(browser, ready.presence_of_element_located((By.TAG_NAME, "h1")))
            scroll, client = browser.execute_script(
                "return [document.documentElement.scrollWidth, "
                "document.documentElement.clientWidth]"
            )
            assert scroll <= client, (path, scroll, client)
    finally:
        browser.set_window_size(1440, 1100)
