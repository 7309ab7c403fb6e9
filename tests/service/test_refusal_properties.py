"""Generated bodies, valid and broken, posted to the service: a registration or a post is never
answered with a server error, and every 422 lists problems whose JSON pointer names the place
in the body (the field, the row, the item) they concern."""

from __future__ import annotations

import json
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ..detectors.instrument_documents import (
    EDGE_NUMBERS,
    JSON_VALUES,
    KEYS,
    broken_documents,
    edge_setting_documents,
    names_a_place,
    pointer_parts,
    valid_documents,
)
from .conftest import make_document

ITEMS = [f"q{i + 1:02d}" for i in range(8)]
URL = "/v1/surveys/pulse/responses"
PROPERTY = settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)


def _post(service, url: str, body: Any, token: str):
    return service.client.post(
        url, content=json.dumps(body).encode(), headers={
            **service.auth(token), "content-type": "application/json",
        },
    )


def _check_refusal(reply, body: Any) -> None:
    """No server error; a 422 names the place of every problem in the body."""
    assert reply.status_code < 500, reply.text
    if reply.status_code != 422:
        return
    problem = reply.json()
    assert problem["errors"], problem
    for entry in problem["errors"]:
        parts = pointer_parts(entry["pointer"])
        assert names_a_place(body, parts), (entry, body)
        if isinstance(body, dict):
            # Only a body that is not an object at all is refused as a whole ("#").
            assert parts, (entry, body)
        if entry.get("item") is not None:
            assert parts and str(parts[-1]) == entry["item"], entry


@PROPERTY
@given(document=st.one_of(valid_documents(), broken_documents(), edge_setting_documents()))
def test_a_registration_never_fails_and_every_refusal_names_its_field(service, document):
    reply = _post(service, "/v1/surveys", document, service.admin)
    _check_refusal(reply, document)
    if reply.status_code in (200, 201):
        # What registration accepts can be screened: a response to every item gets no 5xx.
        lowest = document["response_format"].get("lowest", 1)
        response = {"respondent_id": "r1", "answers": {
            item["id"]: (item.get("response_format") or {}).get("lowest", lowest)
            for item in document["items"]
        }}
        posted = _post(service, f"/v1/surveys/{document['survey']}/responses", response,
                       service.ingest)
        assert posted.status_code < 500, posted.text


# Posted responses ---------------------------------------------------------------------------

TIMES = st.sampled_from([
    "2027-05-04T09:30:00Z", "2027-05-04T09:30:00+02:00", "2027-05-04T09:30:00",
    "2027-13-04T09:30:00Z", "yesterday", "", 1800000000,
])
RESPONDENT_IDS = st.one_of(
    st.text(max_size=12), st.sampled_from(["", "   ", "a/b", "x" * 300, "r1", "r2"]),
    JSON_VALUES,
)
ANSWERS = st.one_of(st.integers(0, 6), EDGE_NUMBERS, st.floats(0, 6), st.text(max_size=3))


ROW_BREAKS = [
    "id", "answer", "unknown_item", "duration", "times", "meta", "unknown_field",
    "answers_shape", "no_answers",
]


@st.composite
def near_valid_rows(draw: st.DrawFn) -> dict[str, Any]:
    """A respondent of the `pulse` survey (items q01..q08, 1..5) with some fields broken."""
    row: dict[str, Any] = {
        "respondent_id": draw(st.from_regex(r"r[0-9]{1,3}", fullmatch=True)),
        "answers": {item: draw(st.integers(1, 5) | st.none()) for item in ITEMS},
    }
    # Breaks of single answers come before those that replace or drop `answers`.
    kinds = draw(st.lists(st.sampled_from(ROW_BREAKS), max_size=3, unique=True))
    for kind in sorted(kinds, key=ROW_BREAKS.index):
        if kind == "id":
            row["respondent_id"] = draw(RESPONDENT_IDS)
        elif kind == "answer":
            row["answers"][draw(st.sampled_from(ITEMS))] = draw(ANSWERS)
        elif kind == "unknown_item":
            row["answers"][draw(KEYS | st.text(max_size=6))] = draw(st.integers(1, 5))
        elif kind == "answers_shape":
            row["answers"] = draw(JSON_VALUES)
        elif kind == "no_answers":
            del row["answers"]
        elif kind == "duration":
            row["duration_seconds"] = draw(EDGE_NUMBERS | st.floats(-10, 1e6) | st.text(max_size=3))
        elif kind == "times":
            row[draw(st.sampled_from(["started_at", "submitted_at"]))] = draw(TIMES)
        elif kind == "meta":
            row["meta"] = draw(JSON_VALUES | st.just({"note": "n" * 3000}))
        else:
            row[draw(KEYS.filter(lambda k: k not in row))] = draw(JSON_VALUES)
    return row


POSTS = st.one_of(
    near_valid_rows(),
    st.builds(lambda rows: {"responses": rows}, st.lists(near_valid_rows(), max_size=4)),
    st.builds(lambda rows: {"responses": rows},
              st.lists(near_valid_rows() | JSON_VALUES, min_size=1, max_size=3)),
    JSON_VALUES,
)


@PROPERTY
@given(body=POSTS, replace=st.booleans(), partial=st.booleans())
def test_a_post_never_fails_and_every_refusal_names_its_field(
    service, survey, body, replace, partial
):
    query = f"?replace={str(replace).lower()}&partial={str(partial).lower()}"
    _check_refusal(_post(service, URL + query, body, service.ingest), body)


def test_a_whole_number_setting_beyond_64_bits_is_refused_at_registration(service):
    # It used to be registered (orjson reads whole numbers up to 2**64 - 1) and then failed
    # every post to the survey with 500, when screening overflowed.
    document = make_document(screening={"long_string": {"run_cutoff": 2**63}})
    reply = _post(service, "/v1/surveys", document, service.admin)
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == ["#/screening/long_string/run_cutoff"]
    assert "beyond a 64-bit integer" in reply.json()["errors"][0]["detail"]
