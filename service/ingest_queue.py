"""Group commit for posted responses.

Posts that arrive while a transaction is being written wait in a queue; one writer thread then
takes all of them (up to a bound), screens their respondents together and writes them in one
transaction (``ingest.ingest_many``). Each post is answered only after that commit. Under load
this spreads the fixed cost of a screening call and of a commit over many posts; a lone post is
written at once. A post refused for its own reasons (bad rows, conflict, signature) does not
affect the others of its group; a group whose write fails all the same is written again one post
at a time, so that only the post at fault fails.
"""

from __future__ import annotations

import datetime as dt
import logging
import threading
import time
from collections import deque
from concurrent.futures import Future
from dataclasses import dataclass

from sqlalchemy.exc import DBAPIError, IntegrityError

from . import store
from .database import Database
from .errors import WriterBusy
from .ingest import DEFERRED, Submission, ingest_many
from .settings import Settings

__all__ = ["IngestQueue"]

log = logging.getLogger("heedful.service")

#: Bounds of one group: posts, and respondents over all its posts.
MAX_POSTS, MAX_ROWS = 256, 20_000
#: A post of at most this many respondents goes in the fast lane (see ``_next_group``).
SMALL_POST = 100
#: Respondents of large posts (batches) one group takes at most (one batch at least).
LARGE_ROWS_PER_GROUP = 10_000
#: Rounds per group for submissions deferred behind an earlier one touching the same respondent.
MAX_ROUNDS = MAX_POSTS
#: How often accepted webhook ids older than twice the timestamp tolerance are forgotten
#: (a replay that old is refused by its timestamp anyway).
PRUNE_EVERY_SECONDS = 60.0


@dataclass
class _Job:
    submission: Submission
    future: Future


class IngestQueue:
    """A writer thread fed by :meth:`submit`; start it lazily, :meth:`close` it at shutdown.

    Posts wait in two lanes (small posts and batches); at most ``max_waiting_posts`` posts and
    ``max_waiting_respondents`` respondents wait at once, beyond which :meth:`submit` raises
    ``WriterBusy``.
    """

    def __init__(self, database: Database, settings: Settings):
        self.database = database
        self.settings = settings
        self._small: deque[_Job] = deque()
        self._large: deque[_Job] = deque()
        self._waiting_rows = 0
        self._last_small = False  # whether the last group was one of small posts
        self._closing = False
        self._ready = threading.Condition()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self._pruned_at = time.monotonic()

    def submit(self, submission: Submission) -> Future:
        """Queue a post for the writer; raises ``WriterBusy`` when too much already waits."""
        future: Future = Future()
        rows = len(submission.rows)
        self._ensure_started()
        with self._ready:
            posts = len(self._small) + len(self._large)
            if posts >= self.settings.max_waiting_posts or (
                posts and self._waiting_rows + rows > self.settings.max_waiting_respondents
            ):
                raise WriterBusy(posts, self._waiting_rows, retry_after=1 + posts // 500)
            (self._small if rows <= SMALL_POST else self._large).append(_Job(submission, future))
            self._waiting_rows += rows
            self._ready.notify()
        return future

    def depth(self) -> int:
        """Posts waiting for the writer (not counting the group being written)."""
        return len(self._small) + len(self._large)

    def close(self, timeout: float = 30.0) -> None:
        with self._lock:
            thread, self._thread = self._thread, None
        if thread is not None:
            with self._ready:
                self._closing = True
                self._ready.notify()
            thread.join(timeout)

    def _ensure_started(self) -> None:
        if self._thread is not None:
            return
        with self._lock:
            if self._thread is None:
                self._closing = False
                self._thread = threading.Thread(
                    target=self._run, name="heedful-ingest", daemon=True
                )
                self._thread.start()

    def _next_group(self) -> list[_Job] | None:
        """The next group to write; None when closing with nothing left to write.

        Small posts and batches go in groups of their own, so that a single response never
        waits for a batch's screening inside its own group. Small posts go first, but after a
        group of small posts a waiting batch has its turn: a single response waits behind at
        most one group of batches, and batches are never starved by a stream of singles."""
        with self._ready:
            while not self._small and not self._large:
                if self._closing:
                    return None
                self._ready.wait()
            group: list[_Job] = []
            rows = 0
            if self._small and not (self._large and self._last_small):
                while self._small and len(group) < MAX_POSTS and rows < MAX_ROWS:
                    job = self._small.popleft()
                    group.append(job)
                    rows += len(job.submission.rows)
                self._last_small = True
            else:
                while self._large and len(group) < MAX_POSTS:
                    size = len(self._large[0].submission.rows)
                    if group and rows + size > LARGE_ROWS_PER_GROUP:
                        break
                    group.append(self._large.popleft())
                    rows += size
                self._last_small = False
            self._waiting_rows -= rows
            return group

    def _run(self) -> None:
        while True:
            group = self._next_group()
            if group is None:
                return
            self._process(group)
            self._maybe_prune()

    def _maybe_prune(self) -> None:
        if time.monotonic() - self._pruned_at < PRUNE_EVERY_SECONDS:
            return
        self._pruned_at = time.monotonic()
        keep = dt.timedelta(seconds=2 * self.settings.webhook_tolerance_seconds)
        try:
            with self.database.write() as session:
                store.prune_deliveries(session, dt.datetime.now(dt.UTC) - keep)
        except DBAPIError as error:  # pruning is housekeeping: try again next time
            log.warning("pruning webhook ids failed: %s", type(error).__name__)

    def _process(self, group: list[_Job]) -> None:
        pending = group
        for _ in range(MAX_ROUNDS):
            try:
                results = self._write([job.submission for job in pending])
            except Exception as error:
                if len(pending) == 1 and not isinstance(error, IntegrityError | DBAPIError):
                    log.error("ingestion failed: %s", type(error).__name__)
                    pending[0].future.set_exception(error)
                    return
                # Another process stored one of these respondents (or ids) first, or one post
                # holds what the database refuses: write the posts one at a time, so each sees
                # what is committed and only the post at fault fails.
                for job in pending:
                    self._one_at_a_time(job)
                return
            waiting = []
            for job, result in zip(pending, results, strict=True):
                if result is DEFERRED:
                    waiting.append(job)
                elif isinstance(result, BaseException):
                    job.future.set_exception(result)
                else:
                    job.future.set_result(result)
            if not waiting:
                return
            pending = waiting
        for job in pending:
            self._one_at_a_time(job)

    def _write(self, submissions: list[Submission]) -> list:
        with self.database.write() as session:
            return ingest_many(session, submissions, self.settings)

    def _one_at_a_time(self, job: _Job) -> None:
        for attempt in range(2):
            try:
                [result] = self._write([job.submission])
            except IntegrityError as error:
                if attempt == 1:
                    job.future.set_exception(error)
                continue
            except Exception as error:
                log.error("ingestion failed: %s", type(error).__name__)
                job.future.set_exception(error)
                return
            if isinstance(result, BaseException):
                job.future.set_exception(result)
            else:
                job.future.set_result(result)
            return
