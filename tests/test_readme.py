"""The README runs as written: its shell blocks are run, in order, in a fresh folder.

The command-line part (before "## The screening service") runs against no database at all but
what its commands make; the service walk-through runs against the demo service that `make run`
starts (``python -m service.demo_server``), on a free port of 127.0.0.1 instead of 8000.

A block runs with the project's environment active (its ``bin`` first on the PATH, as
``. .venv/bin/activate`` does), no ``HEEDFUL_*`` variable set, ``set -euo pipefail``, and
curl told to fail on an HTTP error. An HTML comment on the line before a block changes how it
is run; each says why in the README:

- ``<!-- readme-test: skip (why) -->``: not run (it builds the environment, writes under /srv);
- ``<!-- readme-test: files NAME... (what) -->``: the test first writes the input files the
  block expects from the reader (``wave1.sav``, ``paper-responses.sav``);
- ``<!-- readme-test: demo-server (...) -->``: the test starts the demo service in its place;
- ``<!-- readme-test: serve-briefly (...) -->``: ``heedful serve`` is started in the
  background on a free port, asked for the surveys with the key the block made, and stopped;
- ``<!-- readme-test: expect TEXT -->``: TEXT must appear in the block's standard output.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
SERVICE_HEADING = "## The screening service"
SHELLS = {"sh", "bash", "shell"}
DIRECTIVE = re.compile(r"^<!--\s*readme-test:\s*([a-z-]+)\s*(.*?)\s*-->$")
KNOWN = {"skip", "files", "demo-server", "serve-briefly", "expect"}
SURVEY = "orchard-volunteers-2027"
#: Seconds one block may take (the nightly run and the exports are the longest).
BLOCK_TIMEOUT = 180


@dataclass
class Block:
    line: int  # 1-based line of the opening fence
    language: str
    code: str
    directive: str | None
    argument: str
    service: bool  # in the service walk-through


def readme_blocks() -> list[Block]:
    lines = README.read_text(encoding="utf-8").splitlines()
    blocks, service, i = [], False, 0
    while i < len(lines):
        line = lines[i]
        if line.startswith("## "):
            service = service or line.strip() == SERVICE_HEADING
        if line.startswith("```") and len(line) > 3:
            language, start = line[3:].strip(), i
            i += 1
            body = []
            while not lines[i].startswith("```"):
                body.append(lines[i])
                i += 1
            previous = next((lines[k] for k in range(start - 1, -1, -1) if lines[k].strip()), "")
            match = DIRECTIVE.match(previous.strip())
            directive, argument = (match.group(1), match.group(2)) if match else (None, "")
            blocks.append(
                Block(start + 1, language, "\n".join(body) + "\n", directive, argument, service)
            )
        i += 1
    return blocks


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _environment(folder: Path, **extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HEEDFUL_")}
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    curl_home = folder.parent / f"{folder.name}-curl"
    curl_home.mkdir(exist_ok=True)
    (curl_home / ".curlrc").write_text("fail-with-body\n", encoding="utf-8")
    env["CURL_HOME"] = str(curl_home)
    env.update(extra)
    return env


def _run(block: Block, folder: Path, env: dict[str, str], code: str | None = None) -> str:
    script = "set -euo pipefail\n" + (block.code if code is None else code)
    done = subprocess.run(
        ["bash", "-c", script], cwd=folder, env=env, capture_output=True, text=True,
        timeout=BLOCK_TIMEOUT,
    )
    assert done.returncode == 0, (
        f"README.md line {block.line}: exit code {done.returncode}\n--- block:\n{block.code}"
        f"--- stdout:\n{done.stdout[-3000:]}\n--- stderr:\n{done.stderr[-3000:]}"
    )
    if block.directive == "expect":
        assert block.argument in done.stdout, (
            f"README.md line {block.line}: {block.argument!r} not in the output:\n"
            f"{done.stdout[-3000:]}"
        )
    return done.stdout


# Input files the reader brings ------------------------------------------------------------------


def _labelled_survey_file(path: Path, ids_from: int, n: int, extra_columns: bool) -> None:
    """A labelled SPSS file of demo answers, as a survey program would write it."""
    from service.demo import demo_instrument, demo_responses
    from service.stat_files import write_labelled

    instrument = demo_instrument()
    responses, _ = demo_responses()
    frame = responses.iloc[:n].copy()
    frame["respondent_id"] = [f"p{ids_from + k:04d}" for k in range(n)]
    labels = dict(enumerate(instrument["response_format"]["labels"], start=1))
    variable_labels = {item["id"]: item.get("text", "") for item in instrument["items"]}
    value_labels = {item["id"]: labels for item in instrument["items"]}
    if extra_columns:
        frame["gender"] = [1 + k % 3 for k in range(n)]
        frame["education"] = [1 + k % 4 for k in range(n)]
        value_labels["gender"] = {1: "woman", 2: "man", 3: "another answer"}
        value_labels["education"] = {1: "school", 2: "vocational", 3: "degree", 4: "higher degree"}
    write_labelled(frame, path, "sav", variable_labels=variable_labels,
                   value_labels=value_labels)


INPUT_FILES = {
    "wave1.sav": lambda path: _labelled_survey_file(path, 1, 40, extra_columns=True),
    "paper-responses.sav": lambda path: _labelled_survey_file(path, 5001, 20, False),
}


def _provide_files(block: Block, folder: Path) -> list[str]:
    names = [word for word in block.argument.split() if word in INPUT_FILES]
    assert names, f"README.md line {block.line}: no known input file in {block.argument!r}"
    for name in names:
        INPUT_FILES[name](folder / name)
    return names


# The tests --------------------------------------------------------------------------------------


def test_every_directive_is_known_and_every_shell_block_is_run_or_says_why():
    blocks = [b for b in readme_blocks() if b.language in SHELLS]
    assert len(blocks) >= 20
    for block in blocks:
        assert block.directive in KNOWN | {None}, f"line {block.line}: {block.directive}"
        if block.directive == "skip":
            assert block.argument.startswith("("), f"line {block.line}: a skip says why"


def test_the_instrument_example_is_valid():
    from detectors import lint, parse_instrument

    [example] = [b for b in readme_blocks() if b.language == "json"]
    instrument = parse_instrument(json.loads(example.code))
    assert instrument.survey == SURVEY
    assert {note.code for note in lint(instrument)}  # a three-item example has design notes


def _ignored_by_git(paths: list[str]) -> set[str]:
    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.skip("not a git checkout: cannot ask git what it ignores")
    done = subprocess.run(
        ["git", "check-ignore", "--no-index", "--stdin"], cwd=ROOT, input="\n".join(paths),
        capture_output=True, text=True,
    )
    return set(done.stdout.split())


def _written(folder: Path, brought: list[str]) -> list[str]:
    return sorted(
        str(p.relative_to(folder)) for p in folder.rglob("*")
        if p.is_file() and str(p.relative_to(folder)) not in brought
    )


def test_command_line_walk_through(tmp_path):
    folder = tmp_path / "clone"
    folder.mkdir()
    env = _environment(folder)
    ran, brought = 0, []
    for block in readme_blocks():
        if block.service or block.language not in SHELLS or block.directive == "skip":
            continue
        if block.directive == "files":
            brought += _provide_files(block, folder)
        _run(block, folder, env)
        ran += 1
    assert ran >= 2
    assert (folder / "demo" / "screened.csv").exists() and (folder / "instrument.json").exists()
    written = _written(folder, brought)
    assert set(written) <= _ignored_by_git(written), "git does not ignore what the README writes"


def _wait_until_ready(url: str, process: subprocess.Popen, seconds: float = 90) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        assert process.poll() is None, f"the service ended with exit code {process.returncode}"
        try:
            with urllib.request.urlopen(f"{url}/readyz", timeout=2) as reply:
                if reply.status == 200:
                    return
        except OSError:
            time.sleep(0.2)
    raise AssertionError(f"{url} did not become ready in {seconds} s")


SERVE_BRIEFLY = """
_serve_briefly() {
  HEEDFUL_PORT=%(port)d heedful serve >serve.log 2>&1 &
  local pid=$!
  for _ in $(seq 1 300); do
    curl -s -o /dev/null http://127.0.0.1:%(port)d/readyz && break
    sleep 0.2
  done
  curl -sS http://127.0.0.1:%(port)d/v1/surveys -H "Authorization: Bearer $(cat analyst.key)"
  kill "$pid"
  wait "$pid" || true
  rm -f serve.log
}
"""


@pytest.mark.slow
def test_service_walk_through(tmp_path):
    folder = tmp_path / "clone"
    folder.mkdir()
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    env = _environment(folder)
    server = None
    ran, brought = 0, []
    try:
        for block in readme_blocks():
            if not block.service or block.language not in SHELLS or block.directive == "skip":
                continue
            if block.directive == "demo-server":
                assert block.code.strip() == "make run"
                server = subprocess.Popen(
                    [sys.executable, "-m", "service.demo_server", "--port", str(port),
                     "--out", "demo"],
                    cwd=folder, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                )
                _wait_until_ready(base, server)
                continue
            assert server is not None, f"line {block.line}: a service block before `make run`"
            if block.directive == "files":
                brought += _provide_files(block, folder)
            code = block.code.replace("127.0.0.1:8000", f"127.0.0.1:{port}")
            if block.directive == "serve-briefly":
                assert re.search(r"^heedful serve\b", code, flags=re.M)
                code = SERVE_BRIEFLY % {"port": _free_port()} + re.sub(
                    r"^heedful serve\b.*$", "_serve_briefly", code, flags=re.M
                )
            _run(block, folder, env, code)
            ran += 1
        assert ran >= 15

        # The files the walk-through promises, and what they hold.
        day_folders = list((folder / "nightly").iterdir())
        assert len(day_folders) == 1
        assert (day_folders[0] / SURVEY / f"{SURVEY}.sav").exists()
        assert (day_folders[0] / SURVEY / "report.html").exists()
        assert "not a verdict" in (folder / "report.html").read_text(encoding="utf-8")
        flagged = pd.read_csv(folder / "flagged.csv", dtype={"respondent_id": str})
        assert len(flagged) > 0 and (flagged["flag_count"] > 0).all()
        assert len(pd.read_parquet(folder / "orchard.parquet")) > 600  # demo, posts, imports

        # The review example reviews a respondent with flags.
        [reviewed] = re.findall(r"/respondents/(\w+)/review", README.read_text(encoding="utf-8"))
        analyst = (folder / "demo" / "analyst.key").read_text(encoding="utf-8").strip()
        request = urllib.request.Request(
            f"{base}/v1/surveys/{SURVEY}/respondents/{reviewed}",
            headers={"Authorization": f"Bearer {analyst}"},
        )
        with urllib.request.urlopen(request, timeout=10) as reply:
            detail = json.load(reply)
        assert detail["flag_count"] > 0 and detail["review_decision"] is not None
    finally:
        if server is not None:
            server.terminate()
            try:
                server.wait(timeout=20)
            except subprocess.TimeoutExpired:
                server.kill()
                server.wait()
    written = _written(folder, brought)
    assert set(written) <= _ignored_by_git(written), "git does not ignore what the README writes"
