"""What a newcomer meets first: which database a command reads, files it leaves behind, the
command list, and the cautions that travel with flags (nightly, ingest replies, JSON output)."""

from __future__ import annotations

import datetime as dt
import json
import os
import stat

import pytest

from service import ingest, nightly
from service.cli import main
from service.db import make_engine

from .conftest import body_of, make_document, random_rows, respondent, signed_headers

BASE = "/v1/surveys/pulse"


def _run(capsys, *argv):
    code = main(list(argv))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture
def fresh_folder(tmp_path, monkeypatch):
    """An empty working folder and no database named in the environment."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("HEEDFUL_DATABASE_URL", raising=False)
    return tmp_path


@pytest.mark.parametrize(
    "argv",
    [
        ["report", "--survey", "orchard-volunteers-2027", "--out", "report.html"],
        ["export", "--survey", "orchard-volunteers-2027", "--out", "orchard.sav"],
        ["survey", "list"],
        ["keys", "list"],
        ["rescreen", "--survey", "orchard-volunteers-2027"],
        ["nightly", "--out", "nightly"],
    ],
)
def test_a_command_on_a_missing_database_names_it_and_creates_nothing(fresh_folder, capsys, argv):
    code, _, err = _run(capsys, *argv)
    assert code == 2
    assert "no database at heedful.db" in err and "sqlite:///./heedful.db" in err
    assert "--database" in err and "sqlite:///demo/heedful.db" in err
    assert sorted(os.listdir(fresh_folder)) == []


def test_an_unknown_survey_names_the_database_read(fresh_folder, capsys):
    assert _run(capsys, "db", "upgrade")[0] == 0
    code, _, err = _run(capsys, "report", "--survey", "nope", "--out", "r.html")
    assert code == 2
    assert "no survey 'nope' is registered in the database sqlite:///./heedful.db" in err
    assert not (fresh_folder / "r.html").exists()


def test_a_failed_registration_leaves_no_database_file(fresh_folder, capsys):
    document = make_document()
    document["items"][0]["keyed"] = 2
    (fresh_folder / "bad.json").write_text(json.dumps(document))
    code, _, err = _run(capsys, "survey", "register", "bad.json")
    assert code == 2 and "keyed" in err
    assert sorted(os.listdir(fresh_folder)) == ["bad.json"]


def test_database_files_are_readable_by_their_owner_only(fresh_folder, capsys):
    # Answers can be personal data: no permission bits for group or others on the database
    # or on SQLite's write-ahead log and shared-memory files.
    assert _run(capsys, "db", "upgrade")[0] == 0
    engine = make_engine("sqlite:///./heedful.db")
    with engine.connect() as connection:  # opening in WAL mode creates -wal and -shm
        connection.exec_driver_sql("SELECT 1")
        names = sorted(p.name for p in fresh_folder.iterdir())
        assert "heedful.db" in names
        for name in names:
            mode = stat.S_IMODE((fresh_folder / name).stat().st_mode)
            assert mode & 0o077 == 0, f"{name}: {oct(mode)}"
    engine.dispose()


def test_bare_heedful_and_command_groups_list_their_commands(capsys):
    code, out, _ = _run(capsys)
    assert code == 2
    for command in ("screen", "serve", "report", "export", "nightly", "import", "survey"):
        assert command in out
    code, out, _ = _run(capsys, "keys")
    assert code == 2 and all(action in out for action in ("create", "list", "revoke"))


# nightly --without flagged ----------------------------------------------------------------------


def test_nightly_without_flagged_needs_confirmation_and_records_the_caution(
    database_url, tmp_path, capsys
):
    document = tmp_path / "pulse.json"
    document.write_text(json.dumps(make_document()))
    assert _run(capsys, "survey", "register", str(document), "--database", database_url)[0] == 0
    out = tmp_path / "nightly"
    code, _, err = _run(capsys, "nightly", "--out", str(out), "--without", "flagged",
                        "--database", database_url)
    assert code == 2 and "--confirm-without-flagged" in err and not out.exists()
    code, _, err = _run(capsys, "nightly", "--out", str(out), "--without", "flagged",
                        "--confirm-without-flagged", "--database", database_url)
    assert code == 0, err
    assert "warning:" in err and "without a person having read it" in err
    day = dt.date.today().isoformat()
    record = json.loads((out / day / "pulse" / "nightly.json").read_text())
    assert record["export_without"] == ["flagged"]
    assert record["cautions"] == [nightly.WITHOUT_FLAGGED_CAUTION]
    assert "not a verdict on a person" in record["note"]


# ingest replies ---------------------------------------------------------------------------------


def test_ingest_replies_carry_the_caution_and_can_leave_out_verdict_and_score(service, survey):
    row = respondent("r1", [5] * 8)
    reply = service.client.post(f"{BASE}/responses", json=row,
                                headers=service.auth(service.ingest))
    assert reply.status_code == 201
    body = reply.json()
    assert body["caution"] == ingest.INGEST_CAUTION
    assert {"verdict", "careless_score"} <= set(body["results"][0])

    change = service.client.patch(BASE, json={"verdict_in_replies": False},
                                  headers=service.auth(service.analyst))
    assert change.status_code == 403  # a survey setting is the admin's
    change = service.client.patch(BASE, json={"verdict_in_replies": False},
                                  headers=service.auth(service.admin))
    assert change.status_code == 200 and change.json()["verdict_in_replies"] is False
    shown = service.client.get(BASE, headers=service.auth(service.analyst)).json()
    assert shown["verdict_in_replies"] is False

    signed = body_of(respondent("r2", [1, 5, 1, 5, 1, 5, 1, 5]))
    reply = service.client.post(f"{BASE}/responses", content=signed,
                                headers=signed_headers(survey["webhook_secret"], signed))
    assert reply.status_code == 201
    result = reply.json()["results"][0]
    assert "verdict" not in result and "careless_score" not in result
    assert "flags" in result and reply.json()["caution"] == ingest.INGEST_CAUTION
    # Analysts still see everything.
    detail = service.client.get(f"{BASE}/respondents/r2", headers=service.auth(service.analyst))
    assert detail.json()["verdict"] in ("ok", "review", "likely_careless")


def test_survey_set_command(database_url, tmp_path, capsys):
    document = tmp_path / "pulse.json"
    document.write_text(json.dumps(make_document()))
    assert _run(capsys, "survey", "register", str(document), "--database", database_url)[0] == 0
    code, out, _ = _run(capsys, "survey", "set", "pulse", "--verdict-in-replies", "no",
                        "--database", database_url)
    assert code == 0 and "leave out" in out
    code, out, _ = _run(capsys, "survey", "show", "pulse", "--database", database_url)
    assert json.loads(out)["verdict_in_replies"] is False


def test_every_operation_says_what_it_does_and_ingest_says_what_not_to_do(service):
    document = service.client.get("/openapi.json").json()
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            assert operation.get("description"), f"{method.upper()} {path}"
    ingest = document["paths"]["/v1/surveys/{survey}/responses"]["post"]["description"]
    assert "not a decision" in ingest and "withhold an incentive" in ingest


# validation problems ----------------------------------------------------------------------------


def test_unknown_top_level_field_is_reported_at_its_own_pointer(service, survey):
    row = respondent("r1", [3] * 8, colour="blue")
    reply = service.client.post(f"{BASE}/responses", json=row,
                                headers=service.auth(service.ingest))
    assert reply.status_code == 422
    pointers = [e["pointer"] for e in reply.json()["errors"]]
    assert pointers == ["#/colour"]


def test_a_type_error_does_not_hide_the_other_problems_of_the_body(service, survey):
    # One body, three problems: a wrong type in a top-level field, an answer out of range and
    # an unknown item. All three are listed.
    row = respondent("r1", [3] * 7 + [9], duration_seconds="slow")
    row["answers"]["q99"] = 2
    reply = service.client.post(f"{BASE}/responses", json=row,
                                headers=service.auth(service.ingest))
    assert reply.status_code == 422
    found = {e["pointer"]: e["detail"] for e in reply.json()["errors"]}
    assert set(found) == {"#/duration_seconds", "#/answers/q08", "#/answers/q99"}
    assert "outside the answer range 1..5" in found["#/answers/q08"]
    assert "unknown item" in found["#/answers/q99"]
    # In a batch, the rows are named in the pointers.
    batch = {"responses": [respondent("r0", [3] * 8), row]}
    reply = service.client.post(f"{BASE}/responses", json=batch,
                                headers=service.auth(service.ingest))
    found = {e["pointer"] for e in reply.json()["errors"]}
    assert found == {"#/responses/1/duration_seconds", "#/responses/1/answers/q08",
                     "#/responses/1/answers/q99"}


# screen --format json ---------------------------------------------------------------------------


def test_screen_json_carries_the_note(tmp_path, capsys):
    instrument = tmp_path / "instrument.json"
    instrument.write_text(json.dumps(make_document()))
    rows = random_rows(30, seed=4)
    lines = ["respondent_id," + ",".join(f"q{i:02d}" for i in range(1, 9))]
    for row in rows:
        answers = ["" if a is None else str(a) for a in row["answers"].values()]
        lines.append(",".join([row["respondent_id"], *answers]))
    responses = tmp_path / "responses.csv"
    responses.write_text("\n".join(lines) + "\n")
    out = tmp_path / "screened.json"
    code, _, _ = _run(capsys, "screen", str(responses), "--instrument", str(instrument),
                      "--out", str(out))
    assert code == 0
    document = json.loads(out.read_text())
    assert "not a verdict on a person" in document["note"]
    assert len(document["respondents"]) == 30


def test_the_parser_lists_the_formats_the_writer_knows():
    from service import cli, files

    assert cli.OUTPUT_FORMATS == files.OUTPUT_FORMATS
