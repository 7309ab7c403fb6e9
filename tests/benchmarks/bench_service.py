"""Service speed on loopback: prints figures (not run by `make test`).

1. Single-respondent signed webhook posts from 32 concurrent clients to one `heedful serve`
   worker on SQLite: requests per second, p50 and p99 latency; the same posts to a bare
   endpoint that only validates the body (``bare_endpoint.py``), for the ratio.
2. One 10,000-respondent batch post, end to end (request sent to reply received); and single
   signed posts while four clients post 10,000-respondent batches (the writer's fast lane).
3. A page of 100 flagged respondents from a survey holding 1,000,000 (seeded through the same
   ingestion code the API uses, in batches).

Only 127.0.0.1 is used; every loop is bounded. Usage:

    .venv/bin/python tests/benchmarks/bench_service.py [--requests 8000] [--big 1000000] [--write]

With ``--write`` the figures go to ``docs/speed-service.md`` and into the README between its
marker lines, with the date, the commit and the machine's load.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from service import ingest, store  # noqa: E402
from service.database import Database  # noqa: E402
from service.db import make_engine, upgrade  # noqa: E402
from service.demo import demo_instrument  # noqa: E402
from service.models import Role  # noqa: E402
from service.security import sign_webhook  # noqa: E402
from service.settings import Settings  # noqa: E402

HOST = "127.0.0.1"
CONCURRENCY = 32


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind((HOST, 0))
        return probe.getsockname()[1]


def answers(rng: np.random.Generator, n: int, item_ids: list[str]) -> list[dict]:
    values = rng.integers(1, 6, size=(n, len(item_ids)))
    values[: n // 10] = values[: n // 10, :1]  # a tenth straightline
    return [dict(zip(item_ids, row, strict=True)) for row in values.tolist()]


def prepare(database_url: str) -> tuple[Database, str, str, list[str]]:
    engine = make_engine(database_url)
    upgrade(engine)
    database = Database(engine)
    from service.commands import register_document

    reply = register_document(database, demo_instrument())
    with database.write() as session:
        token = store.create_key(session, f"bench-{os.getpid()}-{time.time_ns()}", Role.ADMIN)
    item_ids = [item["id"] for item in demo_instrument()["items"]]
    return database, reply["webhook_secret"], token, item_ids


def start_server(database_url: str, port: int) -> subprocess.Popen:
    script = Path(sys.executable).with_name("heedful")
    process = subprocess.Popen(
        [str(script), "serve", "--host", HOST, "--port", str(port), "--database", database_url],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        # The rate limit is off: the figures are what one process can take, not what the
        # default limit admits for one survey.
        env={**os.environ, "HEEDFUL_LOG_LEVEL": "warning", "HEEDFUL_RATE_LIMIT_PER_SECOND": "0"},
    )
    return _answering(process, port, "the server")


def _answering(process: subprocess.Popen, port: int, what: str) -> subprocess.Popen:
    """``process`` once its /healthz answers on ``port`` (bounded: 60 s)."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://{HOST}:{port}/healthz", timeout=1).status_code == 200:
                return process
        except httpx.TransportError:
            time.sleep(0.1)
    process.kill()
    raise SystemExit(f"{what} did not start within 60 s")


def start_bare(port: int) -> subprocess.Popen:
    """The bare validating endpoint (``bare_endpoint.py``) on ``port``."""
    process = subprocess.Popen(
        [sys.executable, str(Path(__file__).with_name("bare_endpoint.py")), str(port)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    return _answering(process, port, "the bare endpoint")


def stop(process: subprocess.Popen) -> None:
    process.terminate()
    try:
        process.wait(timeout=15)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait(timeout=15)


# 1. Concurrent single posts, with a minimal keep-alive HTTP/1.1 client (cheap on the CPU the
#    server shares with it).


async def _client(port: int, requests: list[bytes], latencies: list[float], codes: list[int]):
    reader, writer = await asyncio.open_connection(HOST, port)
    try:
        for raw in requests:
            start = time.perf_counter()
            writer.write(raw)
            await writer.drain()
            head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), timeout=30)
            length = 0
            for line in head.split(b"\r\n"):
                if line.lower().startswith(b"content-length:"):
                    length = int(line.split(b":", 1)[1])
            await asyncio.wait_for(reader.readexactly(length), timeout=30)
            latencies.append(time.perf_counter() - start)
            codes.append(int(head[9:12]))
    finally:
        writer.close()


def single_posts(
    port: int, secret: str, item_ids: list[str], total: int, tag: str = "s"
) -> dict:
    """``total`` signed single posts from ``CONCURRENCY`` clients; ``tag`` keeps the
    respondent and webhook ids of one run apart from another's."""
    rng = np.random.default_rng(1)
    rows = answers(rng, total, item_ids)
    now = int(time.time())
    raws = []
    for i, row in enumerate(rows):
        body = json.dumps({"respondent_id": f"{tag}{i:07d}", "answers": row}).encode()
        webhook_id = f"msg_{tag}_{i}"
        headers = (
            f"POST /v1/surveys/orchard-volunteers-2027/responses HTTP/1.1\r\n"
            f"host: {HOST}:{port}\r\ncontent-type: application/json\r\n"
            f"content-length: {len(body)}\r\nwebhook-id: {webhook_id}\r\n"
            f"webhook-timestamp: {now}\r\n"
            f"webhook-signature: {sign_webhook(secret, webhook_id, now, body)}\r\n\r\n"
        )
        raws.append(headers.encode() + body)
    shares = [raws[c::CONCURRENCY] for c in range(CONCURRENCY)]
    latencies: list[float] = []
    codes: list[int] = []

    async def run() -> float:
        start = time.perf_counter()
        await asyncio.gather(*(_client(port, part, latencies, codes) for part in shares))
        return time.perf_counter() - start

    elapsed = asyncio.run(run())
    ms = sorted(1000 * x for x in latencies)
    return {
        "requests": len(latencies),
        "ok": sum(1 for c in codes if c in (200, 201)),
        "per_second": len(latencies) / elapsed,
        "p50_ms": statistics.median(ms),
        "p99_ms": ms[int(0.99 * (len(ms) - 1))],
        "p90_ms": ms[int(0.90 * (len(ms) - 1))],
        "max_ms": ms[-1],
    }


# 1b. The same with wrk, a native load generator, when it is installed (it leaves more of the
#     two cores to the server than a Python client can).

_WRK_SCRIPT = r"""
local counter = 0
function setup(thread)
  thread:set("tid", counter)
  counter = counter + 1
end
function init(args)
  requests = {}
  local nthreads = tonumber(args[2])
  local i = 0
  for line in io.lines(args[1]) do
    if i % nthreads == tid then
      local id, ts, sig, body = line:match("([^\t]*)\t([^\t]*)\t([^\t]*)\t(.*)")
      requests[#requests + 1] = wrk.format("POST",
        "/v1/surveys/orchard-volunteers-2027/responses",
        {["content-type"] = "application/json", ["webhook-id"] = id,
         ["webhook-timestamp"] = ts, ["webhook-signature"] = sig}, body)
    end
    i = i + 1
  end
  n = 0
end
function request()
  n = n + 1
  if n > #requests then n = 1 end
  return requests[n]
end
function done(summary, latency, requests)
  io.write(string.format("WRK %d %d %d %.3f %.3f\n", summary.requests, summary.duration,
    summary.errors.status, latency:percentile(50) / 1000, latency:percentile(99) / 1000))
end
"""


def single_posts_wrk(port: int, secret: str, item_ids: list[str], folder: Path) -> dict | None:
    wrk = shutil.which("wrk")
    if wrk is None:
        return None
    rng = np.random.default_rng(4)
    total, seconds, threads = 40_000, 10, 2  # more requests than 10 s can send: no replays
    now = int(time.time())
    lines = []
    for i, row in enumerate(answers(rng, total, item_ids)):
        body = json.dumps({"respondent_id": f"w{i:07d}", "answers": row})
        webhook_id = f"msg_wrk_{i}"
        signature = sign_webhook(secret, webhook_id, now, body.encode())
        lines.append(f"{webhook_id}\t{now}\t{signature}\t{body}")
    data, script = folder / "wrk_requests.tsv", folder / "posts.lua"
    data.write_text("\n".join(lines) + "\n")
    script.write_text(_WRK_SCRIPT)
    out = subprocess.run(
        [wrk, f"-t{threads}", f"-c{CONCURRENCY}", f"-d{seconds}s", "-s", str(script),
         f"http://{HOST}:{port}", "--", str(data), str(threads)],
        capture_output=True, text=True, timeout=seconds + 60,
    ).stdout
    fields = next(line for line in out.splitlines() if line.startswith("WRK ")).split()
    requests_done, micros, bad = int(fields[1]), int(fields[2]), int(fields[3])
    return {
        "requests": requests_done,
        "non_2xx": bad,
        "per_second": requests_done / (micros / 1e6),
        "p50_ms": float(fields[4]),
        "p99_ms": float(fields[5]),
    }


# 2. One big batch.


def big_batch(port: int, token: str, item_ids: list[str], n: int = 10_000) -> dict:
    rng = np.random.default_rng(2)
    rows = answers(rng, n, item_ids)
    body = json.dumps(
        {"responses": [{"respondent_id": f"b{i:07d}", "answers": r} for i, r in enumerate(rows)]}
    ).encode()
    with httpx.Client(timeout=120) as client:
        start = time.perf_counter()
        reply = client.post(
            f"http://{HOST}:{port}/v1/surveys/orchard-volunteers-2027/responses",
            content=body,
            headers={"Authorization": f"Bearer {token}", "content-type": "application/json"},
        )
        elapsed = time.perf_counter() - start
    assert reply.status_code == 201, reply.text[:300]
    return {"respondents": n, "bytes": len(body), "seconds": elapsed}


# 2b. Single posts while batches load the writer.


def singles_under_batches(
    port: int, secret: str, token: str, item_ids: list[str], batchers: int = 4,
    batches_each: int = 3, n: int = 10_000,
) -> dict:
    """``batchers`` clients each post ``batches_each`` batches of ``n`` respondents, one after
    another, while one client posts a signed single response every 50 ms until they finish
    (bounded: at most 2,000 singles). Returns the singles' latencies."""
    rng = np.random.default_rng(5)
    bodies = []
    for b in range(batchers * batches_each):
        rows = answers(rng, n, item_ids)
        bodies.append(json.dumps({"responses": [
            {"respondent_id": f"lb{b:02d}-{i:06d}", "answers": r} for i, r in enumerate(rows)
        ]}).encode())
    singles = [
        json.dumps({"respondent_id": f"ls{i:06d}", "answers": row}).encode()
        for i, row in enumerate(answers(rng, 2000, item_ids))
    ]
    url = f"http://{HOST}:{port}/v1/surveys/orchard-volunteers-2027/responses"
    latencies: list[float] = []
    batch_codes: list[int] = []

    async def run() -> float:
        done = asyncio.Event()
        async with httpx.AsyncClient(timeout=600) as client:
            async def batcher(mine: list[bytes]) -> None:
                for body in mine:
                    reply = await client.post(url, content=body, headers={
                        "Authorization": f"Bearer {token}", "content-type": "application/json"})
                    batch_codes.append(reply.status_code)

            async def single() -> None:
                await asyncio.sleep(0.5)  # let the batches reach the writer first
                for i, body in enumerate(singles):
                    if done.is_set():
                        break
                    now = int(time.time())
                    webhook_id = f"msg_lane_{i}"
                    headers = {
                        "content-type": "application/json", "webhook-id": webhook_id,
                        "webhook-timestamp": str(now),
                        "webhook-signature": sign_webhook(secret, webhook_id, now, body),
                    }
                    start = time.perf_counter()
                    reply = await client.post(url, content=body, headers=headers)
                    latencies.append(time.perf_counter() - start)
                    assert reply.status_code in (200, 201), reply.text[:200]
                    await asyncio.sleep(0.05)

            start = time.perf_counter()
            poster = asyncio.create_task(single())
            await asyncio.gather(*(batcher(bodies[k::batchers]) for k in range(batchers)))
            done.set()
            await poster
            return time.perf_counter() - start

    elapsed = asyncio.run(run())
    ms = sorted(1000 * x for x in latencies)
    return {
        "batches": len(batch_codes), "batches_ok": sum(c == 201 for c in batch_codes),
        "respondents": len(batch_codes) * n, "seconds": elapsed, "singles": len(ms),
        "p50_ms": statistics.median(ms), "p99_ms": ms[int(0.99 * (len(ms) - 1))],
        "max_ms": ms[-1], "over_1s": sum(x > 1000 for x in ms),
    }


# 3. A page of flagged respondents from a million.


def seed(database: Database, settings: Settings, item_ids: list[str], n: int) -> float:
    rng = np.random.default_rng(3)
    start = time.perf_counter()
    step = 20_000
    for first in range(0, n, step):  # bounded by n
        rows = [
            {"respondent_id": f"m{first + i:07d}", "answers": a}
            for i, a in enumerate(answers(rng, min(step, n - first), item_ids))
        ]
        with database.write() as session:
            survey = store.get_survey(session, "orchard-volunteers-2027")
            ingest.ingest(session, survey, rows, ingest.IngestOptions(), settings)
        print(f"\r  seeded {first + len(rows):,} respondents", end="", file=sys.stderr, flush=True)
    print(file=sys.stderr)
    return time.perf_counter() - start


def page_times(port: int, token: str, params: dict, repeats: int = 50) -> dict:
    url = f"http://{HOST}:{port}/v1/surveys/orchard-volunteers-2027/respondents"
    times = []
    with httpx.Client(timeout=60, headers={"Authorization": f"Bearer {token}"}) as client:
        for _ in range(repeats):
            start = time.perf_counter()
            reply = client.get(url, params=params)
            times.append(1000 * (time.perf_counter() - start))
            assert reply.status_code == 200 and len(reply.json()["data"]) == params["limit"]
        cursor = reply.json()["next_cursor"]
        start = time.perf_counter()
        client.get(url, params={**params, "cursor": cursor})
        next_page = 1000 * (time.perf_counter() - start)
    times.sort()
    return {"p50_ms": statistics.median(times), "max_ms": times[-1], "next_page_ms": next_page}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--requests", type=int, default=8000, help="single posts to send")
    parser.add_argument("--big", type=int, default=1_000_000, help="respondents of part 3")
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-service.md and the README")
    args = parser.parse_args()
    lines: list[str] = []

    def say(line: str) -> None:
        print(line, flush=True)
        lines.append(line)

    say(f"machine: {os.cpu_count()} CPU(s); python {sys.version.split()[0]}; "
        f"load average {os.getloadavg()[0]:.1f} at the start")
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{Path(folder) / 'bench.db'}"
        database, secret, token, item_ids = prepare(url)
        port = free_port()
        server = start_server(url, port)
        try:
            single_posts(port, secret, item_ids, 500, tag="warm")  # not reported
            result = single_posts(port, secret, item_ids, args.requests)
            say(
                f"1. single signed posts, {CONCURRENCY} clients, one worker, SQLite, every "
                f"detector: {result['per_second']:.0f} req/s, p50 {result['p50_ms']:.1f} ms, "
                f"p90 {result['p90_ms']:.1f} ms, p99 {result['p99_ms']:.1f} ms, "
                f"max {result['max_ms']:.0f} ms "
                f"({result['ok']}/{result['requests']} ok)"
            )
            native = single_posts_wrk(port, secret, item_ids, Path(folder))
            if native is None:
                say("1b. (wrk not installed: no native load generator run)")
            else:
                say(
                    f"1b. the same with wrk (native load generator): "
                    f"{native['per_second']:.0f} req/s, p50 {native['p50_ms']:.1f} ms, "
                    f"p99 {native['p99_ms']:.1f} ms ({native['non_2xx']} non-2xx of "
                    f"{native['requests']})"
                )
            batch = big_batch(port, token, item_ids)
            say(
                f"2. one batch of {batch['respondents']:,} respondents "
                f"({batch['bytes'] / 1e6:.1f} MB): {batch['seconds']:.2f} s end to end"
            )
            lane = singles_under_batches(port, secret, token, item_ids)
            say(
                f"2b. single signed posts while 4 clients post {lane['batches']} batches of "
                f"10,000 ({lane['batches_ok']} stored, {lane['respondents'] / lane['seconds']:,.0f}"
                f" respondents/s over {lane['seconds']:.0f} s): {lane['singles']} singles, "
                f"p50 {lane['p50_ms']:.0f} ms, p99 {lane['p99_ms']:.0f} ms, "
                f"max {lane['max_ms']:.0f} ms, {lane['over_1s']} over 1 s (aim: within 1 s)"
            )
        finally:
            stop(server)
        bare_port = free_port()
        bare = start_bare(bare_port)
        try:
            single_posts(bare_port, secret, item_ids, 500, tag="warm")
            plain = single_posts(bare_port, secret, item_ids, args.requests)
            say(
                f"1c. the same posts to a bare endpoint that only validates the body "
                f"(bare_endpoint.py): {plain['per_second']:.0f} req/s, p99 "
                f"{plain['p99_ms']:.1f} ms; the service reaches "
                f"{result['per_second'] / plain['per_second']:.2f} of it"
            )
        finally:
            stop(bare)
        settings = Settings(database_url=url)
        seconds = seed(database, settings, item_ids, args.big)
        total = args.big + args.requests + 500 + 10_000 + 120_000 + lane["singles"]
        say(f"   (seeded {args.big:,} respondents in {seconds:.0f} s; survey holds {total:,})")
        server = start_server(url, port)
        try:
            for label, params in (
                ("flagged, newest first", {"flagged": "true", "limit": 100,
                                           "sort": "-received_at"}),
                ("flagged, most flags first", {"flagged": "true", "limit": 100}),
                ("flagged by long_string", {"detector": "long_string", "limit": 100,
                                            "sort": "-received_at"}),
            ):
                timing = page_times(port, token, params)
                say(
                    f"3. page of 100 ({label}) from {total:,}: p50 {timing['p50_ms']:.1f} ms, "
                    f"max {timing['max_ms']:.1f} ms, next page {timing['next_page_ms']:.1f} ms"
                )
        finally:
            stop(server)
        database.dispose()
    if args.write:
        write_figures(lines)
    return 0


#: The README's copy of the figures lies between these lines.
START = "<!-- service speed: written by bench_service.py -->"
END = "<!-- end service speed -->"


def write_figures(lines: list[str]) -> None:
    from figures import write_figures as write_file
    from figures import write_readme_block

    written = write_file("speed-service.md", "Speed of the service", "bench_service.py", lines)
    write_readme_block(START, END, written.read_text().split("\n", 2)[2].rstrip("\n"))


if __name__ == "__main__":
    raise SystemExit(main())
