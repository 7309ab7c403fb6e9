"""The screening report (HTML) and the screening history in the respondent detail."""

from __future__ import annotations

import base64
import datetime as dt
from html.parser import HTMLParser

import numpy as np
import pytest
from sqlalchemy import text

from detectors import REGISTRY, matrix_from_frame, parse_instrument
from detectors.planting import KINDS
from detectors.reliability import cronbach_alpha, keyed_answers
from service import rescreen, store, survey_data
from service.cli import main
from service.reports import CAUTION_HEAD, build_report

from .conftest import make_document, random_rows, respondent, stored_results

URL = "/v1/surveys/pulse/responses"


class _Page(HTMLParser):
    """The images, headings, table rows and text of a page."""

    def __init__(self):
        super().__init__()
        self.images: list[dict[str, str]] = []
        self.text: list[str] = []
        self.rows: list[list[str]] = []
        self._row: list[str] | None = None
        self._cell = False
        self.tags: set[str] = set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        if tag == "img":
            self.images.append(dict(attrs))
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._row.append("")
            self._cell = True

    def handle_endtag(self, tag):
        if tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None
        elif tag in ("td", "th"):
            self._cell = False

    def handle_data(self, data):
        self.text.append(data)
        if self._cell and self._row is not None:
            self._row[-1] += data


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    parser.close()
    return parser


def _screened_survey(service, n: int = 150) -> None:
    """The 'pulse' survey with n respondents, re-screened against a reference sample."""
    rows = random_rows(n, seed=5)
    reply = service.client.post(URL, json={"responses": rows},
                                headers=service.auth(service.ingest))
    assert reply.status_code == 201, reply.text
    assert service.client.post(
        "/v1/surveys/pulse/rescreen", headers=service.auth(service.admin)
    ).status_code == 200


def test_report_renders_every_picture_offline(service, survey):
    _screened_survey(service)
    reviewer = service.auth(service.analyst)
    # r00000 is one of the straightliners (the first tenth of random_rows)
    service.client.post("/v1/surveys/pulse/respondents/r00000/review", headers=reviewer,
                        json={"decision": "exclude", "note": "one answer throughout"})
    # A finding stored in the reference sample (as a person-fit detector would) is shown.
    with service.database.write() as session:
        found = store.get_survey(session, "pulse")
        reference = store.reference_of(session, found.current_reference_id)
        reference.data = {**reference.data,
                          "person_fit": {"notes": ["item q03: thresholds 2 and 3 disordered"]}}
    reply = service.client.get("/v1/surveys/pulse/report", headers=reviewer)
    assert reply.status_code == 200, reply.text
    assert reply.headers["content-type"].startswith("text/html")
    page = _parse(reply.text)
    plots = {image.get("data-plot"): image for image in page.images}
    assessed = {
        name for (_, name), (state, _, _) in stored_results(service.database).items()
        if state == 0
    }
    expected = {f"distribution-{name}" for name in assessed} | {"overlap", "days", "patterns"}
    assert expected <= set(plots)
    for image in page.images:
        assert image["src"].startswith("data:image/png;base64,")
        png = base64.b64decode(image["src"].split(",", 1)[1], validate=True)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification)
        assert image.get("alt")
    words = " ".join(page.text)
    assert CAUTION_HEAD in words
    assert "thresholds 2 and 3 disordered" in words and "person_fit.notes" in words
    # Self-contained: nothing is loaded from elsewhere.
    assert not {"script", "link", "iframe"} & page.tags
    assert "http://" not in reply.text and "https://" not in reply.text
    # The scale table: everyone, without the flagged, without those reviewed as exclude.
    [scale_row] = [row for row in page.rows if row and row[0] == "s"]
    assert scale_row[2] == "150"  # everyone answering at least half the items has a score
    with service.database.read() as session:
        flagged = session.execute(
            text("SELECT count(*) FROM respondents WHERE flag_count > 0")
        ).scalar_one()
    assert scale_row[6] == f"{150 - flagged:,}" and scale_row[10] == "149"


def test_report_alpha_matches_the_formula_on_the_stored_answers(service, survey):
    _screened_survey(service, n=120)
    page = _parse(service.client.get("/v1/surveys/pulse/report",
                                     headers=service.auth(service.analyst)).text)
    [scale_row] = [row for row in page.rows if row and row[0] == "s"]
    # Cronbach (1951) on the posted answers themselves, reverse-keyed, pairwise.
    import pandas as pd

    rows = random_rows(120, seed=5)
    frame = pd.DataFrame([{**r["answers"], "respondent_id": r["respondent_id"]} for r in rows])
    instrument = parse_instrument(make_document())
    matrix = matrix_from_frame(instrument, frame).matrix
    alpha = cronbach_alpha(keyed_answers(instrument, matrix, instrument.scales["s"]))
    assert scale_row[5] == f"{alpha:.3f}"


def test_report_of_a_survey_without_respondents(service, survey):
    reply = service.client.get("/v1/surveys/pulse/report", headers=service.auth(service.analyst))
    assert reply.status_code == 200
    page = _parse(reply.text)
    assert page.images == [] and CAUTION_HEAD in " ".join(page.text)
    # the drill then plants among answers simulated from the instrument, and says so
    words = " ".join(page.text)
    assert "Simulation." in words and "answers simulated from the instrument" in words


def test_report_drill_plants_among_the_surveys_own_respondents(service, survey):
    _screened_survey(service, n=300)
    reply = service.client.get("/v1/surveys/pulse/report", headers=service.auth(service.analyst))
    page = _parse(reply.text)
    words = " ".join(page.text)
    assert "What this questionnaire can catch" in words and "Simulation." in words
    assert "300 of this survey's respondents" in words
    kinds = [row[0] for row in page.rows if row and row[0] in KINDS]
    assert kinds == list(KINDS)
    assert "Meade, A. W., & Craig, S. B. (2012)" in words


def test_report_needs_an_analyst_key_and_a_known_survey(service, survey):
    assert service.client.get("/v1/surveys/pulse/report").status_code == 401
    assert service.client.get(
        "/v1/surveys/pulse/report", headers=service.auth(service.ingest)
    ).status_code == 403
    reply = service.client.get("/v1/surveys/nope/report", headers=service.auth(service.analyst))
    assert reply.status_code == 404
    assert reply.headers["content-type"].startswith("application/problem+json")


def test_report_command(service, survey, database_url, tmp_path, capsys):
    _screened_survey(service, n=60)
    out = tmp_path / "report.html"
    code = main(["report", "--survey", "pulse", "--out", str(out), "--database", database_url])
    assert code == 0, capsys.readouterr().err
    page = _parse(out.read_text(encoding="utf-8"))
    assert {"overlap", "days", "patterns"} <= {i.get("data-plot") for i in page.images}
    code = main(["report", "--survey", "nope", "--out", str(out), "--database", database_url])
    assert code == 2 and "no survey 'nope'" in capsys.readouterr().err


# Screening history ------------------------------------------------------------------------------


def _detail(service, rid: str) -> dict:
    reply = service.client.get(f"/v1/surveys/pulse/respondents/{rid}",
                               headers=service.auth(service.analyst))
    assert reply.status_code == 200, reply.text
    return reply.json()


def test_history_keeps_the_earlier_result_when_a_rescreen_changes_it(service, survey):
    headers = service.auth(service.ingest)
    rows = random_rows(120, seed=3)
    service.client.post(URL, json={"responses": rows}, headers=headers)
    before = _detail(service, "r00050")
    assert before["screening_history"] == []
    sample = [name for name, cls in REGISTRY.items() if cls.needs_sample]
    admin = service.auth(service.admin)
    assert service.client.post("/v1/surveys/pulse/rescreen", headers=admin).status_code == 200
    after = _detail(service, "r00050")
    # The sample-based detectors could not judge before the reference existed; now they can:
    # a changed result, so the earlier one is kept.
    [earlier] = after["screening_history"]
    assert earlier["flags"] == before["flags"] and earlier["verdict"] == before["verdict"]
    assert earlier["careless_score"] == before["careless_score"]
    assert earlier["reference_id"] is None and earlier["version"] == 1
    assert earlier["screened_at"] == before["received_at"]
    for result in before["results"]:
        kept = earlier["results"][result["detector"]]
        assert kept["state"] == result["state"] and kept["flagged"] == result["flagged"]
        assert kept["score"] == result["score"] and kept["version"] == result["detector_version"]
    for name in sample:
        assert earlier["results"][name]["state"] == "not_assessed"

    # The same data again: a new reference estimated from the same answers gives the same
    # results, so nothing is added to the history.
    assert service.client.post("/v1/surveys/pulse/rescreen", headers=admin).status_code == 200
    assert len(_detail(service, "r00050")["screening_history"]) == 1
    with service.database.read() as session:
        total = session.execute(text("SELECT count(*) FROM screening_history")).scalar_one()
    assert total == 120

    # A new version with a strict long-string cut-off changes flags: a second entry, newest
    # first.
    strict = make_document(screening={"long_string": {"run_cutoff": 2}})
    assert service.client.post("/v1/surveys", json=strict, headers=admin).status_code == 201
    assert service.client.post("/v1/surveys/pulse/rescreen", headers=admin).status_code == 200
    with service.database.read() as session:
        twice = session.execute(
            text("SELECT r.respondent_id FROM screening_history h JOIN respondents r "
                 "ON r.id = h.respondent_pk GROUP BY r.respondent_id HAVING count(*) = 2")
        ).scalars().all()
    assert len(twice) > 60  # runs of two equal answers are common in random answers
    # The version-1 cut-off is calibrated from the reference, so a few random answerers were
    # already flagged for a run; the change shows on those that were not.
    details = [_detail(service, rid) for rid in twice[:10]]
    latest = next(d for d in details if "long_string" not in d["screening_history"][0]["flags"])
    assert latest["version"] == 2 and "long_string" in latest["flags"]
    newest, oldest = latest["screening_history"]
    assert newest["replaced_at"] > oldest["replaced_at"]
    assert newest["version"] == 1 and "long_string" not in newest["flags"]
    assert newest["results"]["mahalanobis"]["state"] == "assessed"


def test_erasure_removes_the_screening_history(service, survey):
    service.client.post(URL, json={"responses": random_rows(120, seed=3)},
                        headers=service.auth(service.ingest))
    admin = service.auth(service.admin)
    service.client.post("/v1/surveys/pulse/rescreen", headers=admin)
    assert service.client.delete("/v1/surveys/pulse/respondents/r00001",
                                 headers=admin).status_code == 204
    with service.database.read() as session:
        pks = session.execute(text("SELECT respondent_pk FROM screening_history")).scalars()
        alive = session.execute(text("SELECT id FROM respondents")).scalars().all()
    assert set(pks) <= set(alive)


def test_replaced_answers_are_screened_on_arrival_not_kept_as_screening_history(service, survey):
    headers = service.auth(service.ingest)
    service.client.post(URL, json=respondent("x", [1, 2, 3, 4, 5, 4, 3, 2]), headers=headers)
    service.client.post(URL + "?replace=true", json=respondent("x", [3] * 8), headers=headers)
    detail = _detail(service, "x")
    assert len(detail["history"]) == 1 and detail["screening_history"] == []


@pytest.mark.parametrize("missing", ["pairwise", "listwise"])
def test_alpha_of_stored_answers_equals_alpha_of_posted_ones(service, survey, missing):
    # The service's vectorised reader gives the same matrix the posted rows describe.
    rows = random_rows(80, seed=8)
    service.client.post(URL, json={"responses": rows}, headers=service.auth(service.ingest))
    with service.database.read() as session:
        found = store.get_survey(session, "pulse")
        [target] = rescreen.screening_targets(session, found)
        stored = rescreen.read_stored(session, found.id, target)
    posted = np.array(
        [[np.nan if v is None else v for v in r["answers"].values()] for r in rows], dtype=float
    )
    instrument = target.screener.instrument
    posted[:, instrument.keyed == -1] = 6 - posted[:, instrument.keyed == -1]
    ours = cronbach_alpha(keyed_answers(instrument, stored.matrix, np.arange(8)), missing)
    assert ours == pytest.approx(cronbach_alpha(posted, missing), abs=1e-12)


def test_a_report_from_a_shared_read_equals_one_read_on_its_own(service, survey):
    _screened_survey(service, n=90)
    service.client.post("/v1/surveys/pulse/respondents/r00000/review",
                        headers=service.auth(service.analyst),
                        json={"decision": "exclude", "note": "straight line"})
    now = dt.datetime(2027, 5, 4, 12, tzinfo=dt.UTC)
    with service.database.read() as session:
        survey_row = store.get_survey(session, "pulse")
        alone = build_report(session, survey_row, now=now)
        shared = survey_data.read_survey(session, survey_row, chunk=7)
        assert build_report(session, survey_row, now=now, stored=shared) == alone


def test_report_counts_add_up_and_say_why_a_detector_judged_nobody(service, survey):
    _screened_survey(service)
    reply = service.client.get("/v1/surveys/pulse/report", headers=service.auth(service.analyst))
    page = _parse(reply.text)
    words = " ".join(page.text)
    with service.database.read() as session:
        verdicts = dict(session.execute(
            text("SELECT verdict, count(*) FROM respondents GROUP BY verdict")
        ).all())
        by_flag = dict(session.execute(text(
            "SELECT verdict, count(*) FROM respondents WHERE flag_count > 0 GROUP BY verdict"
        )).all())
    ok, review, likely = (verdicts.get(v, 0) for v in ("ok", "review", "likely_careless"))
    assert ok + review + likely == 150
    assert (f"Of the 150 respondents, {ok} have the verdict ok, {review} review and {likely} "
            "likely careless.") in words
    flagged = sum(by_flag.values())
    assert (f"Of the {flagged} flagged by at least one detector, {by_flag.get('review', 0)} are "
            f"to review, {by_flag.get('likely_careless', 0)} likely careless and "
            f"{by_flag.get('ok', 0)} ok") in words
    # Eight items on one scale: the detectors that need several scales judge nobody, and the
    # report says why in the detector's own words.
    nobody = [
        name for name in REGISTRY
        if f"detector-{name}" in reply.text and all(
            state != 0 for (_, n), (state, _, _) in stored_results(service.database).items()
            if n == name
        )
    ]
    assert nobody
    assert words.count("Why respondents were not assessed") >= len(nobody)


def test_a_bar_that_dwarfs_the_others_is_cut_and_labelled():
    from matplotlib.figure import Figure

    from service.reports import CLIP_RATIO, _clip_counts

    axes = Figure().add_subplot()
    axes.bar([0, 1, 2], [572, 9, 4])
    assert _clip_counts(axes, np.array([0.0, 1.0, 2.0]), np.array([572, 9, 4]))
    assert axes.get_ylim()[1] < 572 and [t.get_text() for t in axes.texts] == ["572 \u2191"]
    even = Figure().add_subplot()
    assert not _clip_counts(even, np.array([0.0, 1.0]), np.array([int(CLIP_RATIO * 10) - 1, 10]))
    assert len(even.texts) == 0
