"""Rate limits: a token bucket per caller, and one per client address for failed credentials.

Each key (or, for signed webhook posts, each survey) may make ``rate_limit_per_second``
requests a second on average, with bursts up to ``rate_limit_burst``; a client address that
presents ``failed_auth_burst`` wrong keys or signatures in a row is refused with 429 until its
bucket refills at ``failed_auth_per_second``. The buckets live in the process: with several
replicas, each replica counts on its own.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

from .errors import TooManyRequests
from .settings import Settings

__all__ = ["TokenBuckets", "Limits"]


class TokenBuckets:
    """Named token buckets holding at most ``burst`` tokens, refilled at ``rate`` a second.

    A rate of 0 or less switches the limit off. Buckets that have refilled completely are
    forgotten when more than ``max_names`` are held, so the memory stays bounded.
    """

    def __init__(
        self, rate: float, burst: float, *, max_names: int = 100_000,
        clock: Callable[[], float] = time.monotonic,
    ):
        self.rate = rate
        self.burst = max(burst, 1.0)
        self.max_names = max_names
        self._clock = clock
        self._buckets: dict[str, tuple[float, float]] = {}  # name -> (tokens, when)
        self._lock = threading.Lock()

    @property
    def enabled(self) -> bool:
        return self.rate > 0

    def _level(self, name: str, now: float) -> float:
        tokens, when = self._buckets.get(name, (self.burst, now))
        return min(self.burst, tokens + (now - when) * self.rate)

    def wait(self, name: str) -> float:
        """Seconds until ``name`` has a whole token (0 when it has one now); takes nothing."""
        if not self.enabled:
            return 0.0
        with self._lock:
            level = self._level(name, self._clock())
        return 0.0 if level >= 1 else (1 - level) / self.rate

    def take(self, name: str) -> float:
        """Take a token for ``name``: 0 when there was one, else the seconds until there is
        one (nothing taken)."""
        if not self.enabled:
            return 0.0
        with self._lock:
            now = self._clock()
            level = self._level(name, now)
            if level < 1:
                return (1 - level) / self.rate
            self._buckets[name] = (level - 1, now)
            if len(self._buckets) > self.max_names:
                self._forget_full(now)
        return 0.0

    def _forget_full(self, now: float) -> None:
        full = [name for name in self._buckets if self._level(name, now) >= self.burst]
        for name in full:
            del self._buckets[name]
        if len(self._buckets) > self.max_names:  # all busy: start again rather than grow
            self._buckets.clear()


class Limits:
    """The service's rate limits (``app.state.limits``)."""

    def __init__(self, settings: Settings, clock: Callable[[], float] = time.monotonic):
        self.callers = TokenBuckets(
            settings.rate_limit_per_second, settings.rate_limit_burst, clock=clock
        )
        self.failures = TokenBuckets(
            settings.failed_auth_per_second, settings.failed_auth_burst, clock=clock
        )

    def check_address(self, address: str | None) -> None:
        """Refuse an address that has used up its failed-credentials budget."""
        wait = self.failures.wait(address or "?")
        if wait > 0:
            raise TooManyRequests("failed-credentials", _seconds(wait))

    def failed(self, address: str | None) -> None:
        """Count a wrong key or signature against the address."""
        self.failures.take(address or "?")

    def admit(self, caller: str) -> None:
        """Take one request from the caller's budget (a key's name, ``survey:<id>`` for signed
        posts), or refuse it."""
        wait = self.callers.take(caller)
        if wait > 0:
            raise TooManyRequests("rate-limit", _seconds(wait))


def _seconds(wait: float) -> int:
    return max(1, math.ceil(wait))
