"""Start the service with the demo survey registered (what ``make run`` does).

Writes the demo data (see ``service.demo``), a request body with every demo response
(``responses.json``), one key per role and the survey's webhook secret into the demo folder, so
the commands printed (and the README's) work as written. The demo database is recreated on
every start: it only ever holds the invented demo data.

    python -m service.demo_server [--host 127.0.0.1] [--port 8000] [--out demo]
"""

from __future__ import annotations

import argparse
import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = ["prepare_demo", "main"]

ROLES = ("admin", "ingest", "analyst")


def _write_secret(path: Path, text: str) -> None:
    path.write_text(text + "\n", encoding="utf-8")
    os.chmod(path, 0o600)


def _batch(responses: Any, item_ids: Sequence[str]) -> dict[str, Any]:
    import pandas as pd

    rows = []
    for record in responses.to_dict("records"):
        answers = {item: None if pd.isna(record[item]) else int(record[item]) for item in item_ids}
        rows.append(
            {
                "respondent_id": str(record["respondent_id"]),
                "answers": answers,
                "duration_seconds": float(record["duration_seconds"]),
            }
        )
    return {"responses": rows}


def prepare_demo(out: str | Path, database_url: str | None = None) -> dict[str, Any]:
    """Write the demo files, create a fresh demo database with the survey and keys.

    Returns the database URL, the survey id, the keys by role and the webhook secret.
    """
    from . import store
    from .database import Database
    from .db import make_engine, upgrade
    from .demo import demo_instrument, demo_responses, write_demo
    from .models import Role
    from .registration import register_survey

    out = Path(out)
    write_demo(out)
    instrument = demo_instrument()
    responses, _ = demo_responses()
    item_ids = [item["id"] for item in instrument["items"]]
    (out / "responses.json").write_text(json.dumps(_batch(responses, item_ids)), encoding="utf-8")
    if database_url is None:
        path = out / "heedful.db"
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        database_url = f"sqlite:///{path}"
    engine = make_engine(database_url)
    upgrade(engine)
    database = Database(engine)
    registered = register_survey(database, instrument)
    keys = {}
    with database.write() as session:
        for role in ROLES:
            name = f"demo-{role}"
            if store.revoke_key(session, name):  # a reused database: start from fresh keys
                name = f"{name}-{os.getpid()}"
            keys[role] = store.create_key(session, name, Role(role))
    database.dispose()
    for role, token in keys.items():
        _write_secret(out / f"{role}.key", token)
    _write_secret(out / "webhook_secret.txt", registered.webhook_secret)
    return {
        "database_url": database_url,
        "survey": registered.survey,
        "keys": keys,
        "webhook_secret": registered.webhook_secret,
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Run Heedful with the demo survey registered.")
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, default=8000)
    parser.add_argument("--out", default="demo", help="demo folder (default: %(default)s)")
    parser.add_argument("--database", metavar="URL", help="default: a fresh OUT/heedful.db")
    args = parser.parse_args(argv)

    import uvicorn

    from .app import create_app, prepare_process
    from .settings import Settings

    demo = prepare_demo(args.out, args.database)
    settings = Settings(database_url=demo["database_url"], host=args.host, port=args.port)
    app = create_app(settings)
    prepare_process()
    base = f"http://{args.host}:{args.port}"
    survey = demo["survey"]
    print(
        "\n".join(
            [
                "",
                f"Heedful demo: {base}",
                f"  interactive docs: {base}/docs",
                f"  demo survey:      {survey}",
                *(f"  {role + ' key:':<17} {token}" for role, token in demo["keys"].items()),
                f"  webhook secret:   {demo['webhook_secret']}",
                f"  (keys and secret are also in {args.out}/*.key and "
                f"{args.out}/webhook_secret.txt)",
                "",
                "Post the demo responses from another terminal:",
                f"  curl -sS -X POST {base}/v1/surveys/{survey}/responses \\",
                f'    -H "Authorization: Bearer $(cat {args.out}/ingest.key)" \\',
                "    -H 'Content-Type: application/json' "
                f"--data-binary @{args.out}/responses.json -o {args.out}/reply.json",
                f"  head -c 700 {args.out}/reply.json; echo",
                "Then review them in the browser: open",
                f"  {base}/review",
                f"  and sign in with the analyst key above ({args.out}/analyst.key);",
                "or list the flagged respondents:",
                f"  curl -sS '{base}/v1/surveys/{survey}/respondents?flagged=true&limit=10' \\",
                f'    -H "Authorization: Bearer $(cat {args.out}/analyst.key)"',
                "",
                f"The heedful commands read this database with --database "
                f"{demo['database_url']}",
                "",
                "Flags are evidence for a reviewer's decision, not a verdict. Ctrl-C stops.",
                "",
            ]
        ),
        flush=True,
    )
    uvicorn.run(app, host=args.host, port=args.port, log_level="warning")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
