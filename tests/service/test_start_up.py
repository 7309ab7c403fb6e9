"""Commands that do not screen load no heavy module: each runs in a fresh interpreter, which
then reports what it imported. This checks the structure (what is imported where), not the
time; `tests/benchmarks/bench_startup.py` measures the time."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from service.db import head_revision, newest_revision_on_file

from .conftest import make_document

#: Modules only screening, files, reports, exports or the web service need.
HEAVY = (
    "scipy.stats",
    "scipy.sparse",
    "pandas",
    "pyarrow",
    "matplotlib",
    "sklearn",
    "pyreadstat",
    "fastapi",
    "uvicorn",
)

RUN = """
import json, sys
from service.cli import main
code = None
try:
    code = main(sys.argv[2:])
except SystemExit as stop:
    code = stop.code
loaded = [m for m in sys.modules if m in json.loads(sys.argv[1]) or m.split(".")[0] == "alembic"]
sys.stderr.write("\\nLOADED " + json.dumps({"code": code, "loaded": sorted(loaded)}) + "\\n")
"""


def _loaded(*argv: str, cwd: Path) -> tuple[int, list[str]]:
    """The exit code of ``heedful ARGV`` in a new interpreter, and the heavy modules (and
    Alembic's) it had imported when it finished."""
    done = subprocess.run(
        [sys.executable, "-c", RUN, json.dumps(HEAVY), *argv],
        cwd=cwd, capture_output=True, text=True, timeout=120,
    )
    last = done.stderr.rstrip().splitlines()[-1]
    assert last.startswith("LOADED "), done.stderr
    reply = json.loads(last.removeprefix("LOADED "))
    return reply["code"], reply["loaded"]


@pytest.mark.parametrize(
    "argv",
    [["--help"], [], ["db", "--help"], ["survey"], ["export", "--help"], ["serve", "--help"]],
)
def test_help_imports_nothing_heavy(argv, tmp_path):
    code, loaded = _loaded(*argv, cwd=tmp_path)
    assert code in (0, 2)
    assert loaded == []


def test_database_commands_import_nothing_heavy(tmp_path):
    database = f"sqlite:///{tmp_path / 'start.db'}"
    instrument = tmp_path / "instrument.json"
    instrument.write_text(json.dumps(make_document()), encoding="utf-8")
    code, loaded = _loaded("db", "upgrade", "--database", database, cwd=tmp_path)
    assert code == 0
    assert [m for m in loaded if not m.startswith("alembic")] == []  # migrating needs Alembic
    # A database already at the newest schema: Alembic is not started either.
    for argv in (
        ["keys", "create", "--role", "analyst", "--name", "ana"],
        ["keys", "list"],
        ["survey", "register", str(instrument)],
        ["survey", "list"],
        ["survey", "show", "pulse"],
        ["survey", "set", "pulse", "--verdict-in-replies", "no"],
        ["keys", "revoke", "ana"],
    ):
        code, loaded = _loaded(*argv, "--database", database, cwd=tmp_path)
        assert code == 0, argv
        assert loaded == [], argv


def test_registering_imports_only_the_detectors_the_document_configures(tmp_path):
    # The document configures one detector's settings: only that detector's module is needed
    # to check it.
    document = make_document()
    document["screening"] = {"long_string": {"run_cutoff": 8}}
    instrument = tmp_path / "instrument.json"
    instrument.write_text(json.dumps(document), encoding="utf-8")
    database = f"sqlite:///{tmp_path / 'start.db'}"
    assert _loaded("db", "upgrade", "--database", database, cwd=tmp_path)[0] == 0
    modules = ["detectors." + name for name in detector_names()] + ["detectors.screening"]
    done = subprocess.run(
        [sys.executable, "-c", RUN, json.dumps(modules), "survey", "register", str(instrument),
         "--database", database],
        cwd=tmp_path, capture_output=True, text=True, timeout=120,
    )
    reply = json.loads(done.stderr.rstrip().splitlines()[-1].removeprefix("LOADED "))
    assert reply["code"] == 0, done.stderr
    assert [m for m in reply["loaded"] if not m.startswith("alembic")] == ["detectors.long_string"]


def detector_names() -> list[str]:
    from detectors import REGISTRY

    return list(REGISTRY)


def test_the_library_imports_without_scipy_stats_or_pandas():
    code = (
        "import sys, detectors; "
        "print(sorted(m for m in ('scipy.stats', 'scipy.sparse', 'pandas', 'sklearn') "
        "if m in sys.modules))"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True
    )
    assert done.stdout.strip() == "[]"


def test_newest_revision_read_from_the_files_is_alembics_head():
    # Alembic's own reading of the migration scripts is the check value.
    assert newest_revision_on_file() == head_revision()
