"""Figures files under docs/ written by the benchmark scripts, with the date and the commit."""

from __future__ import annotations

import datetime as dt
import os
import subprocess
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def write_figures(file_name: str, title: str, script: str, lines: list[str]) -> Path:
    """Write ``lines`` to docs/``file_name`` under ``title``, saying which script wrote them,
    when, at which commit and under what load."""
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                            capture_output=True, text=True).stdout.strip()
    load = os.getloadavg()[0]
    path = ROOT / "docs" / file_name
    path.write_text(
        f"# {title}\n\n"
        f"Written by `tests/benchmarks/{script}` on {dt.date.today()} at commit "
        f"`{commit}` (load average {load:.1f} on {os.cpu_count()} cores when it ended).\n\n"
        "```\n" + "\n".join(lines) + "\n```\n"
    )
    return path


def write_readme_block(start: str, end: str, text: str) -> None:
    """Put ``text`` between the README's marker lines ``start`` and ``end``, so the README's
    copy of the figures cannot drift from the figures file."""
    readme = ROOT / "README.md"
    head, rest = readme.read_text().split(start, 1)
    _, tail = rest.split(end, 1)
    readme.write_text(f"{head}{start}\n{text}\n{end}{tail}")
