"""Start-up times: prints figures (not run by `make test`).

Each command runs in a new process, several times; the figures are the wall time from start to
exit (fastest and median) and the processor time (user + system, median), which moves less when
another process shares the cores. Measured:

- `heedful --help`;
- commands that only read or change the database (a SQLite file at the newest schema): keys
  list, survey list, survey show, survey register of an instrument already registered;
- importing the library (`import detectors`) and the web application (`import service.app`);
- `heedful serve` on 127.0.0.1 until `/healthz` first answers 200 (every wait bounded to 60 s).

Usage:

    .venv/bin/python tests/benchmarks/bench_startup.py [--repeats 7] [--write]

``--write`` also writes the figures to docs/speed-startup.md and the README, with the date and
the commit.
"""

from __future__ import annotations

import argparse
import os
import resource
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
HOST = "127.0.0.1"
#: Longest wait for a server to answer /healthz.
SERVE_DEADLINE_SECONDS = 60
#: The aim for commands that do not screen.
AIM_SECONDS = 0.5


def heedful() -> list[str]:
    return [str(Path(sys.executable).with_name("heedful"))]


def _children_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def timed(argv: list[str], cwd: Path) -> tuple[float, float]:
    """Wall and processor seconds of one run of ``argv`` (which must succeed)."""
    cpu = _children_cpu()
    start = time.perf_counter()
    subprocess.run(argv, cwd=cwd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    return time.perf_counter() - start, _children_cpu() - cpu


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind((HOST, 0))
        return probe.getsockname()[1]


def serve_until_healthy(database_url: str, cwd: Path) -> tuple[float, float]:
    """Seconds from starting `heedful serve` to its first 200 on /healthz (wall, and the
    server's processor time once stopped)."""
    port = free_port()
    cpu = _children_cpu()
    start = time.perf_counter()
    process = subprocess.Popen(
        [*heedful(), "serve", "--host", HOST, "--port", str(port), "--database", database_url],
        cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        env={**os.environ, "HEEDFUL_LOG_LEVEL": "warning"},
    )
    try:
        deadline = time.monotonic() + SERVE_DEADLINE_SECONDS
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(f"http://{HOST}:{port}/healthz", timeout=1) as reply:
                    if reply.status == 200:
                        wall = time.perf_counter() - start
                        break
            except (urllib.error.URLError, ConnectionError):
                time.sleep(0.005)
        else:
            raise SystemExit(f"the server did not answer within {SERVE_DEADLINE_SECONDS} s")
    finally:
        process.terminate()
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=15)
    return wall, _children_cpu() - cpu


def measure(run, repeats: int) -> dict[str, float]:
    run()  # once to warm the file cache and write the bytecode
    walls, cpus = zip(*(run() for _ in range(repeats)), strict=True)
    return {"fastest": min(walls), "median": statistics.median(walls),
            "cpu": statistics.median(cpus)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7, help="runs of each (default: 7)")
    parser.add_argument("--serve-repeats", type=int, default=3,
                        help="server starts (default: 3)")
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-startup.md (date, commit)")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory() as folder:
        cwd = Path(folder)
        database = f"sqlite:///{cwd / 'heedful.db'}"
        db = ["--database", database]
        subprocess.run([*heedful(), "demo-data", "--out", "demo", "--respondents", "10"],
                       cwd=cwd, check=True, capture_output=True)
        subprocess.run([*heedful(), "survey", "register", "demo/instrument.json", *db],
                       cwd=cwd, check=True, capture_output=True)
        survey = "orchard-volunteers-2027"
        commands = {
            "heedful --help": [*heedful(), "--help"],
            "heedful keys list": [*heedful(), "keys", "list", *db],
            "heedful survey list": [*heedful(), "survey", "list", *db],
            "heedful survey show": [*heedful(), "survey", "show", survey, *db],
            "heedful survey register (unchanged)":
                [*heedful(), "survey", "register", "demo/instrument.json", *db],
            "python -c 'import detectors'": [sys.executable, "-c", "import detectors"],
            "python -c 'import service.app'": [sys.executable, "-c", "import service.app"],
        }
        figures = {
            name: measure(lambda argv=argv: timed(argv, cwd), args.repeats)
            for name, argv in commands.items()
        }
        figures["heedful serve, until /healthz answers"] = measure(
            lambda: serve_until_healthy(database, cwd), args.serve_repeats
        )

    width = max(map(len, figures))
    lines = [
        f"{'what':<{width}}  fastest  median  cpu (median)",
        *(
            f"{name:<{width}}  {f['fastest']:6.3f}s {f['median']:6.3f}s {f['cpu']:6.3f}s"
            for name, f in figures.items()
        ),
        f"(runs: {args.repeats} each, {args.serve_repeats} server starts, after one warm-up; "
        f"aim for commands that do not screen: under {AIM_SECONDS} s)",
    ]
    print("\n".join(lines))
    if args.write:
        from figures import write_figures, write_readme_block

        written = write_figures("speed-startup.md", "Start-up times", "bench_startup.py", lines)
        text = written.read_text().split("\n", 2)[2]  # the stamp and the figures
        write_readme_block(START, END, text.rstrip("\n"))
    return 0


#: The README's copy of the figures lies between these lines.
START = "<!-- start-up figures: written by bench_startup.py -->"
END = "<!-- end start-up figures -->"


if __name__ == "__main__":
    sys.exit(main())
