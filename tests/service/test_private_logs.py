"""No answers, meta or respondent ids reach the log, even when the database fails."""

from __future__ import annotations

import logging
import warnings

from sqlalchemy import text

from .conftest import body_of, respondent, signed_headers

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

URL = "/v1/surveys/pulse/responses"
RESPONDENT = "private-respondent-7781"
META = "private-meta-5521"


def _log_text(records: list[logging.LogRecord]) -> str:
    formatter = logging.Formatter("%(name)s %(levelname)s %(message)s")
    return "\n".join(formatter.format(record) for record in records)


def test_a_database_error_logs_no_respondent_data(service, survey, caplog):
    with service.database.write() as session:
        # Forces every read and write of respondents to fail in the database itself.
        session.execute(text("ALTER TABLE respondents RENAME TO respondents_elsewhere"))
    caplog.set_level(logging.INFO)  # SQLAlchemy logs statements with their parameters at INFO
    caplog.set_level(logging.DEBUG, logger="heedful")
    answers = [2, 4, 2, 4, 2, 4, 2, 4]
    body = body_of(respondent(RESPONDENT, answers, meta={"note": META}))
    signed = service.client.post(URL, content=body,
                                 headers=signed_headers(survey["webhook_secret"], body))
    # A client that raises what the app lets through, as a server would log it.
    with TestClient(service.app, raise_server_exceptions=True) as strict:
        keyed = strict.post(URL, content=body, headers={
            **service.auth(service.ingest), "content-type": "application/json"})
        read = strict.get(f"/v1/surveys/pulse/respondents/{RESPONDENT}",
                          headers=service.auth(service.analyst))
    assert [signed.status_code, keyed.status_code, read.status_code] == [500, 500, 500]
    # The test client's own request lines (the httpx logger) are the caller's, not the service's.
    logged = _log_text([r for r in caplog.records if not r.name.startswith("httpx")])
    assert "failed 500 http-500:OperationalError" in logged or "failed 500 http-500:ProgrammingError" in logged
    assert "/v1/surveys/{survey}/respondents/{respondent}" in logged
    for private in (RESPONDENT, META, "[2, 4, 2, 4"):
        assert private not in logged, private
