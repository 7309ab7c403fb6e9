"""The service's commands: db upgrade, keys, survey, rescreen, openapi; exit codes."""

from __future__ import annotations

import json

from service.cli import main
from service.database import Database
from service.db import current_revision, head_revision, make_engine
from service.security import token_lookup

from .conftest import make_document, random_rows


def _run(capsys, *argv):
    code = main(list(argv))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_db_upgrade_creates_the_schema(database_url, capsys):
    code, out, _ = _run(capsys, "db", "upgrade", "--database", database_url)
    assert code == 0 and head_revision() in out
    engine = make_engine(database_url)
    assert current_revision(engine) == head_revision()
    engine.dispose()


def test_keys_create_list_revoke(database_url, capsys):
    code, out, _ = _run(
        capsys, "keys", "create", "--role", "analyst", "--name", "ana", "--database", database_url
    )
    assert code == 0
    token = out.strip().splitlines()[-1]
    assert token_lookup(token) is not None
    code, _, err = _run(
        capsys, "keys", "create", "--role", "analyst", "--name", "ana", "--database", database_url
    )
    assert code == 2 and "already exists" in err
    code, out, _ = _run(capsys, "keys", "list", "--database", database_url)
    assert code == 0 and "ana" in out and "analyst" in out and token not in out
    assert _run(capsys, "keys", "revoke", "ana", "--database", database_url)[0] == 0
    code, _, err = _run(capsys, "keys", "revoke", "nobody", "--database", database_url)
    assert code == 2 and "no key" in err


def test_survey_register_list_show_and_rescreen(database_url, tmp_path, capsys):
    path = tmp_path / "instrument.json"
    path.write_text(json.dumps(make_document()))
    code, out, _ = _run(capsys, "survey", "register", str(path), "--database", database_url)
    assert code == 0 and "version 1 (new version)" in out and "whsec_" in out
    code, out, _ = _run(capsys, "survey", "register", str(path), "--database", database_url)
    assert code == 0 and "unchanged" in out
    code, out, _ = _run(capsys, "survey", "list", "--database", database_url)
    assert code == 0 and "pulse" in out
    code, out, _ = _run(capsys, "survey", "show", "pulse", "--database", database_url)
    shown = json.loads(out)
    assert shown["version"] == 1 and shown["webhook_secret"].startswith("whsec_")

    # Store respondents through the use case the API uses, then re-screen from the CLI.
    from service import ingest, store
    from service.settings import Settings

    settings = Settings(database_url=database_url, reference_min_respondents=50)
    database = Database(make_engine(database_url))
    with database.write() as session:
        ingest.ingest(session, store.get_survey(session, "pulse"), random_rows(80),
                    ingest.IngestOptions(), settings)
    database.dispose()
    code, out, _ = _run(capsys, "rescreen", "--survey", "pulse", "--database", database_url)
    assert code == 0 and "re-screened 80 respondent(s)" in out


def test_bad_input_exits_2(database_url, tmp_path, capsys):
    assert _run(capsys, "survey", "show", "nope", "--database", database_url)[0] == 2
    assert _run(capsys, "rescreen", "--survey", "nope", "--database", database_url)[0] == 2
    code, _, err = _run(capsys, "survey", "register", str(tmp_path / "none.json"),
                        "--database", database_url)
    assert code == 2 and "no such file" in err
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({**make_document(), "response_format": {"points": 1}}))
    code, _, err = _run(capsys, "survey", "register", str(bad), "--database", database_url)
    assert code == 2 and "response_format.points" in err
    code, _, err = _run(capsys, "keys", "list", "--database", "mysql://x@y/z")
    assert code == 2 and "unsupported database URL" in err
