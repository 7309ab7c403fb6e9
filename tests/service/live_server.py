"""`heedful serve` as a real process on a free loopback port, for the tests that talk to it over
HTTP, fuzz it or kill it. Every wait is bounded."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

HOST = "127.0.0.1"
#: Longest wait for a started server to answer /healthz (a loaded 2-core machine included).
START_SECONDS = 90
#: Longest wait for a server to stop after SIGTERM before it is killed.
STOP_SECONDS = 15


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((HOST, 0))
        return probe.getsockname()[1]


def heedful_command() -> list[str]:
    script = Path(sys.executable).with_name("heedful")
    return [str(script)] if script.exists() else [sys.executable, "-m", "service.cli"]


def create_key(database_url: str, role: str, name: str | None = None) -> str:
    """A new key made by `heedful keys create` (the token is the last line it prints)."""
    done = subprocess.run(
        [*heedful_command(), "keys", "create", "--role", role, "--name", name or role,
         "--database", database_url],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()[-1]


@dataclass
class LiveServer:
    """A running `heedful serve` process and where it listens."""

    process: subprocess.Popen
    port: int
    log: Path

    @property
    def url(self) -> str:
        return f"http://{HOST}:{self.port}"

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def stop(self) -> None:
        """SIGTERM, then SIGKILL when it has not stopped in time."""
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=STOP_SECONDS)
            except subprocess.TimeoutExpired:
                self.kill()
        self.process.wait(timeout=STOP_SECONDS)

    def kill(self) -> None:
        """SIGKILL: the process gets no chance to finish anything."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
        self.process.wait(timeout=STOP_SECONDS)


def start_server(
    database_url: str, log: Path, *, port: int | None = None, env: Mapping[str, str] | None = None
) -> LiveServer:
    """Start `heedful serve` on ``port`` (a free one by default) and wait for /healthz."""
    port = port or free_port()
    with log.open("ab") as out:
        process = subprocess.Popen(
            [*heedful_command(), "serve", "--host", HOST, "--port", str(port),
             "--database", database_url],
            stdout=out, stderr=subprocess.STDOUT,
            env={**os.environ, "HEEDFUL_LOG_LEVEL": "warning", **(env or {})},
        )
    server = LiveServer(process, port, log)
    deadline = time.monotonic() + START_SECONDS
    with httpx.Client(base_url=server.url, timeout=5) as client:
        while True:
            if process.poll() is not None:
                raise AssertionError(f"heedful serve stopped at start:\n{server.log_text()}")
            try:
                if client.get("/healthz").status_code == 200:
                    return server
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                server.kill()
                raise AssertionError(f"heedful serve did not answer within {START_SECONDS} s")
            time.sleep(0.1)


@contextmanager
def serving(
    database_url: str, log: Path, *, port: int | None = None, env: Mapping[str, str] | None = None
) -> Iterator[LiveServer]:
    """A started server, stopped (or killed) on the way out."""
    server = start_server(database_url, log, port=port, env=env)
    try:
        yield server
    finally:
        server.stop()
