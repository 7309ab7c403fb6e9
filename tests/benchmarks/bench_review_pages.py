"""Speed of the review pages on loopback: prints figures (not run by `make test`).

A survey of 1,000,000 respondents (the demo instrument, a tenth straightlining; seeded through
the same ingestion code the API uses), one `heedful serve` on SQLite, one signed-in session
asking one page at a time: the surveys page, the queue (default, filtered, a later page), a
respondent's page and recording a decision (the post and its redirect target). p50 and the
slowest of each, in milliseconds. Only 127.0.0.1 is used; every loop is bounded. Usage:

    .venv/bin/python tests/benchmarks/bench_review_pages.py [--respondents 1000000] [--write]

With ``--write`` the figures go to ``docs/speed-review.md`` and into the README between its
marker lines, with the date, the commit and the machine's load.
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import sys
import tempfile
import time
from pathlib import Path

import httpx

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_service import HOST, free_port, prepare, seed, start_server, stop  # noqa: E402

from service.settings import Settings  # noqa: E402

SURVEY = "orchard-volunteers-2027"
FORM_TOKEN = re.compile(r'name="form_token" value="([^"]+)"')
LINKS = re.compile(r'class="respondent-link" href="([^"]+)"')
NEXT = re.compile(r'href="(\?[^"]*cursor=[^"]+)" rel="next"')


def timed(client: httpx.Client, method: str, url: str, repeats: int, **kwargs) -> dict:
    """p50 and slowest of ``repeats`` requests after the first, and the first's own time (the
    survey's counts are made then and remembered for a minute)."""
    times = []
    reply = None
    for _ in range(repeats + 1):  # bounded
        start = time.perf_counter()
        reply = client.request(method, url, **kwargs)
        times.append(1000 * (time.perf_counter() - start))
        assert reply.status_code in (200, 303), (url, reply.status_code)
    first, times = times[0], sorted(times[1:])
    return {"p50": statistics.median(times), "max": times[-1], "first": first, "reply": reply}


def sign_in(client: httpx.Client, key: str) -> None:
    page = client.get("/review/sign-in")
    token = FORM_TOKEN.search(page.text).group(1)
    reply = client.post("/review/sign-in", data={"key": key, "form_token": token})
    assert reply.status_code == 303, reply.status_code


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--repeats", type=int, default=30)
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-review.md and the README")
    args = parser.parse_args()
    lines: list[str] = []

    def say(line: str) -> None:
        print(line, flush=True)
        lines.append(line)

    say(f"machine: {os.cpu_count()} CPU(s); python {sys.version.split()[0]}; "
        f"load average {os.getloadavg()[0]:.1f} at the start")
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{Path(folder) / 'bench.db'}"
        database, _secret, token, item_ids = prepare(url)
        seconds = seed(database, Settings(database_url=url), item_ids, args.respondents)
        database.dispose()
        say(f"survey of {args.respondents:,} respondents x {len(item_ids)} items, one "
            f"`heedful serve` on SQLite (seeded in {seconds:.0f} s); one session, one page at "
            f"a time, {args.repeats} times each")
        port = free_port()
        server = start_server(url, port)
        try:
            with httpx.Client(base_url=f"http://{HOST}:{port}", timeout=120) as client:
                sign_in(client, token)
                queue = f"/review/surveys/{SURVEY}"
                cases = [
                    ("surveys page (counts by verdict and review)", "/review/surveys"),
                    ("queue, default (flagged, not reviewed, most flags first)", queue),
                    ("queue, likely careless flagged by long_string",
                     f"{queue}?verdict=likely_careless&detector=long_string"),
                ]
                first = None
                for label, path in cases:
                    result = timed(client, "GET", path, args.repeats)
                    say(f"{label}: p50 {result['p50']:.0f} ms, slowest {result['max']:.0f} ms "
                        f"(first view {result['first']:.0f} ms)")
                    if first is None and path == queue:
                        first = result["reply"].text
                later = NEXT.search(first or "")
                if later:
                    result = timed(client, "GET", queue + later.group(1).replace("&amp;", "&"),
                                   args.repeats)
                    say(f"queue, next page: p50 {result['p50']:.0f} ms, "
                        f"slowest {result['max']:.0f} ms")
                links = [link.replace("&amp;", "&") for link in LINKS.findall(first or "")]
                result = timed(client, "GET", links[0], args.repeats)
                say(f"respondent page (drawing, every detector's evidence, neighbours): p50 "
                    f"{result['p50']:.0f} ms, slowest {result['max']:.0f} ms")
                form = FORM_TOKEN.findall(result["reply"].text)[-1]
                times = []
                for link in links[: args.repeats]:  # bounded: one page of the queue
                    path = link.split("?", 1)[0]
                    start = time.perf_counter()
                    reply = client.post(path, data={"decision": "keep", "note": "bench",
                                                    "form_token": form, "queue": ""})
                    assert reply.status_code == 303, reply.status_code
                    times.append(1000 * (time.perf_counter() - start))
                times.sort()
                say(f"record a decision (post, then the next respondent found): p50 "
                    f"{statistics.median(times):.0f} ms, slowest {times[-1]:.0f} ms "
                    f"({len(times)} decisions)")
        finally:
            stop(server)
    if args.write:
        write_figures(lines)
    return 0


#: The README's copy of the figures lies between these lines.
START = "<!-- review pages speed: written by bench_review_pages.py -->"
END = "<!-- end review pages speed -->"


def write_figures(lines: list[str]) -> None:
    from figures import write_figures as write_file
    from figures import write_readme_block

    written = write_file("speed-review.md", "Speed of the review pages", "bench_review_pages.py",
                         lines)
    write_readme_block(START, END, written.read_text().split("\n", 2)[2].rstrip("\n"))


if __name__ == "__main__":
    raise SystemExit(main())
