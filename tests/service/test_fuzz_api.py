"""Schema-driven fuzzing of a live `heedful serve` with schemathesis.

The published OpenAPI document is the contract: every operation is called with values made
from its schema, valid and broken (the coverage phase's boundary and wrong-type values, the
fuzzing phase's random ones, and stateful sequences that follow the links between operations:
register, post, list, read, review, erase). Every reply must be free of server errors, carry
a documented status, a documented content type, and a body and headers that match the schema.

Bounded: few examples per operation and a time limit on the whole run, so it stays within a
couple of minutes on two shared cores (``HEEDFUL_FUZZ_EXAMPLES`` asks for more by hand).
Nothing is excluded: a failure of any kind fails the test.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import httpx
import pytest

from .conftest import make_document, random_rows
from .live_server import create_key, serving

#: Examples per operation and phase: enough for the coverage phase's boundary values and a
#: few dozen random and stateful cases, little enough for `make test`.
EXAMPLES = int(os.environ.get("HEEDFUL_FUZZ_EXAMPLES", "25"))
#: The same cases every run unless another seed is asked for (a failure can be replayed).
SEED = os.environ.get("HEEDFUL_FUZZ_SEED", "20261202")
#: Longest the fuzzer may run (it normally takes well under half of this).
RUN_SECONDS = 480
CHECKS = ",".join([
    "not_a_server_error",
    "status_code_conformance",
    "content_type_conformance",
    "response_schema_conformance",
    "response_headers_conformance",
])
SURVEY = "pulse"


def _schemathesis() -> list[str]:
    script = Path(sys.executable).with_name("st")
    return [str(script)] if script.exists() else [sys.executable, "-m", "schemathesis.cli"]


def _config(respondents: list[str]) -> str:
    """Operations on one respondent get stored ones (random ids would only meet 404s); the
    erasure gets its own, so the others still find theirs."""
    readable, erasable = respondents[0], respondents[1]
    return f"""
[[operations]]
include-name = ["GET /v1/surveys/{{survey}}/respondents/{{respondent}}",
                "POST /v1/surveys/{{survey}}/respondents/{{respondent}}/review"]
parameters = {{ survey = "{SURVEY}", respondent = "{readable}" }}

[[operations]]
include-name = "DELETE /v1/surveys/{{survey}}/respondents/{{respondent}}"
parameters = {{ survey = "{SURVEY}", respondent = "{erasable}" }}
"""


@pytest.mark.fuzz
@pytest.mark.slow
def test_schemathesis_finds_no_failure(tmp_path):
    database_url = f"sqlite:///{tmp_path / 'heedful.db'}"
    admin = create_key(database_url, "admin")
    # No rate limits: the fuzzer's few thousand requests (and wrong keys) are what is tested.
    limits_off = {"HEEDFUL_RATE_LIMIT_PER_SECOND": "0", "HEEDFUL_FAILED_AUTH_PER_SECOND": "0"}
    with serving(database_url, tmp_path / "serve.log", env=limits_off) as server:
        auth = {"Authorization": f"Bearer {admin}"}
        with httpx.Client(base_url=server.url, headers=auth, timeout=60) as client:
            registered = client.post("/v1/surveys", json=make_document(survey=SURVEY))
            assert registered.status_code == 201, registered.text
            rows = random_rows(120, seed=5)
            posted = client.post(f"/v1/surveys/{SURVEY}/responses", json={"responses": rows})
            assert posted.status_code == 201, posted.text
        config = tmp_path / "schemathesis.toml"
        config.write_text(_config([row["respondent_id"] for row in rows]))
        command = [
            *_schemathesis(), "--config-file", str(config), "run", f"{server.url}/openapi.json",
            "--phases", "coverage,fuzzing,stateful", "--max-examples", str(EXAMPLES),
            "--checks", CHECKS, "--header", f"Authorization: Bearer {admin}",
            "--seed", SEED, "--generation-database", "none",
            # One worker: the parallel workers' schema walks trip a CPython 3.11 parser error.
            "--workers", "1", "--request-timeout", "60", "--continue-on-failure",
            "--no-color", "--output-truncate", "false",
        ]
        try:
            done = subprocess.run(
                command, cwd=tmp_path, capture_output=True, text=True, timeout=RUN_SECONDS,
            )
        except subprocess.TimeoutExpired as stopped:
            pytest.fail(f"schemathesis ran over {RUN_SECONDS} s:\n{stopped.stdout}")
        output = done.stdout + done.stderr
        print(output)  # shown with -s or -rP: what ran
        assert done.returncode == 0, f"{output}\n--- server log ---\n{server.log_text()[-5000:]}"
    # It really ran: every phase passed and thousands of cases were sent.
    for phase in ("Coverage", "Fuzzing", "Stateful"):
        assert re.search(rf"✅ {phase}\b", output), output
    generated = re.search(r"(\d+) generated", output)
    assert generated and int(generated.group(1)) >= 100 * EXAMPLES // 25, output
