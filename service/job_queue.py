"""How jobs reach a worker: a Huey queue, embedded or shared.

Without ``HEEDFUL_JOB_BROKER`` the queue is a SQLite file (``queue.db`` in the job folder,
beside a SQLite database) consumed by threads of ``heedful serve`` itself: no other server.
With ``HEEDFUL_JOB_BROKER=redis://...`` the queue lives in Redis, and every ``heedful serve``
replica and ``heedful worker`` process consumes it. Either way the queue only carries job ids:
the job's row (``service.jobs``) says what to do and who runs it, and a worker runs a job only
after taking it with a conditional update, so a job offered twice (a sweep's second offer, a
message read by two consumers) still runs once. Both queues keep their messages across a
restart; a job whose worker died while running it is found stale by the sweep and queued again.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from . import jobs
from .database import Database
from .db import sqlite_path, utcnow
from .job_runner import JobRunner, job_folder, private_folder
from .jobs import JobView
from .metrics import Metrics
from .models import JobKind
from .settings import Settings

if TYPE_CHECKING:
    from huey import Huey

__all__ = ["JobQueue", "QUEUE_FILE"]

log = logging.getLogger("heedful.jobs")

#: The queue's file in the job folder when no broker is set.
QUEUE_FILE = "queue.db"
#: Longest wait of an idle consumer between looks at a SQLite queue (seconds).
_MOST_IDLE_SECONDS = 1.0


class JobQueue:
    """One process's side of the queue: offering jobs and, when asked to, consuming them."""

    def __init__(self, database: Database, settings: Settings, metrics: Metrics):
        self.database = database
        self.settings = settings
        self.runner = JobRunner(database, settings, metrics, self.offer)
        self._huey: Huey | None = None
        self._task: Any = None
        self._consumer: Any = None
        self._sweeper: threading.Thread | None = None
        self._stop = threading.Event()
        self._lock = threading.Lock()

    @property
    def huey(self) -> Huey:
        """The queue, opened on first use (building the app opens no file and no connection)."""
        with self._lock:
            if self._huey is None:
                self._huey, self._task = self._open()
            return self._huey

    def _open(self) -> tuple[Huey, Any]:
        from huey import MemoryHuey, RedisHuey, SqliteHuey

        name = self.settings.job_queue_name
        huey: Huey
        in_memory = (
            sqlite_path(self.settings.database_url) is None
            and self.settings.database_url.startswith("sqlite")
        )
        if self.settings.job_broker:
            huey = RedisHuey(name, results=False, url=self.settings.job_broker)
        elif in_memory and not self.settings.job_folder:
            huey = MemoryHuey(name, results=False)  # an in-memory database: nothing to keep
        else:
            folder = private_folder(job_folder(self.settings))
            huey = SqliteHuey(name, results=False, filename=str(folder / QUEUE_FILE))
        runner = self.runner

        def run_job(job_id: str) -> None:
            try:
                runner.run(job_id)
            except Exception as error:  # logged here by type: a traceback could quote rows
                log.error("job could not be run", extra={
                    "event": "job-error", "reason": type(error).__name__,
                })

        return huey, huey.task(name="run_job")(run_job)

    def offer(self, job_id: str) -> None:
        """Put a job on the queue (its row is committed first)."""
        huey = self.huey
        huey.enqueue(self._task.s(job_id))

    def submit(
        self, survey: str, kind: JobKind, options: Mapping[str, Any], requested_by: str
    ) -> JobView:
        """Record a new job and offer it to the workers (raises ``UnknownSurvey``). When the
        queue cannot be reached the job stays queued and a sweep offers it again."""
        with self.database.write() as session:
            job = jobs.submit(session, survey, kind, options, requested_by, utcnow())
        try:
            self.offer(job.id)
        except Exception as error:
            log.warning("job could not be offered", extra={
                "event": "job-offer-failed", "survey": survey, "reason": type(error).__name__,
            })
        return job

    def waiting(self) -> int:
        """Messages on the queue (a job offered twice counts twice)."""
        return int(self.huey.pending_count())

    # consuming --------------------------------------------------------------------------------

    def consume(self, workers: int) -> None:
        """Start ``workers`` threads that run jobs from the queue, and the sweep; returns at
        once (``close`` stops them)."""
        if workers <= 0 or self._consumer is not None:
            return
        self._consumer = _consumer(self.huey, workers)
        self._consumer.start()
        self._sweeper = threading.Thread(target=self._sweep_loop, name="heedful-job-sweep",
                                         daemon=True)
        self._sweeper.start()

    def run_worker(self, workers: int) -> None:
        """Consume in the foreground (``heedful worker``): SIGTERM lets a running job finish
        (up to a minute), SIGINT stops at once (the job is found stale and runs again)."""
        self._sweeper = threading.Thread(target=self._sweep_loop, name="heedful-job-sweep",
                                         daemon=True)
        self._sweeper.start()
        consumer = self.huey.create_consumer(
            workers=workers, periodic=False, max_delay=_MOST_IDLE_SECONDS,
            check_worker_health=True, graceful_signal="TERM", shutdown_timeout=60,
        )
        try:
            consumer.run()
        finally:
            self._stop.set()

    def _sweep_loop(self) -> None:
        every = max(0.2, self.settings.job_stale_seconds / 3)
        while True:
            try:
                self.runner.sweep()
            except Exception as error:  # the database is away for a moment
                log.warning("job sweep failed", extra={
                    "event": "job-sweep-failed", "reason": type(error).__name__,
                })
            if self._stop.wait(every):
                return

    def close(self, wait_seconds: float = 10.0) -> None:
        """Stop consuming: a running job may finish within ``wait_seconds``; one that does
        not is found stale later and queued again."""
        self._stop.set()
        if self._consumer is not None:
            self._consumer.shutdown_timeout = wait_seconds
            self._consumer.stop(graceful=True)
            self._consumer = None
        if self._sweeper is not None:
            self._sweeper.join(timeout=wait_seconds)
            self._sweeper = None
        if self._huey is not None:
            storage = self._huey.storage
            if hasattr(storage, "close"):
                storage.close()
            pool = getattr(storage, "pool", None)
            if pool is not None:
                pool.disconnect()


def _consumer(huey: Huey, workers: int) -> Any:
    """A Huey consumer whose threads run inside this process: it installs no signal handlers
    (the server owns them, and they can only be set from the main thread)."""
    from huey.consumer import Consumer

    class Embedded(Consumer):
        def _set_signal_handlers(self) -> None:
            return None

    return Embedded(
        huey, workers=workers, periodic=False, max_delay=_MOST_IDLE_SECONDS,
        check_worker_health=False,
    )
