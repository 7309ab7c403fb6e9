"""The service's settings: one object, read from ``HEEDFUL_*`` environment variables once.

Bad values fail when the settings are built (at start-up), never at the first request.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

__all__ = ["Settings", "get_settings", "DEFAULT_DATABASE_URL", "SUPPORTED_DRIVERS"]

DEFAULT_DATABASE_URL = "sqlite:///./heedful.db"
#: The database URLs Heedful is tested on.
SUPPORTED_DRIVERS = ("sqlite", "sqlite+pysqlite", "postgresql+psycopg")


class Settings(BaseSettings):
    """Everything an operator can set. Each field is read from ``HEEDFUL_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="HEEDFUL_", extra="ignore", frozen=True)

    database_url: str = Field(
        default=DEFAULT_DATABASE_URL,
        description="SQLAlchemy URL: sqlite:///path.db or postgresql+psycopg://user@host/db.",
    )
    host: str = Field(default="127.0.0.1", description="Address `heedful serve` listens on.")
    port: int = Field(default=8000, ge=1, le=65535, description="Port `heedful serve` listens on.")
    max_body_bytes: int = Field(
        default=32 * 1024 * 1024, ge=1024, description="Largest accepted request body (413 above)."
    )
    max_batch_respondents: int = Field(
        default=50_000, ge=1, description="Most respondents accepted in one post."
    )
    max_meta_bytes: int = Field(
        default=2048, ge=0, description="Largest `meta` object per respondent, as compact JSON."
    )
    webhook_tolerance_seconds: int = Field(
        default=300, ge=1, description="Signed webhooks older or newer than this are refused."
    )
    secret_grace_seconds: int = Field(
        default=3600, ge=0, description="How long a rotated-out webhook secret still verifies."
    )
    reference_min_respondents: int = Field(
        default=100,
        ge=2,
        description="Fewest stored respondents from which a reference sample is estimated.",
    )
    page_limit_max: int = Field(default=1000, ge=1, description="Largest `limit` of a page.")
    log_level: str = Field(default="info", description="Log level of `heedful serve`.")
    rate_limit_per_second: float = Field(
        default=1000.0, ge=0,
        description="Requests a second each key (for signed posts: each survey) may make on "
        "average; 0 switches the limit off.",
    )
    rate_limit_burst: int = Field(
        default=2000, ge=1, description="Requests a key may make at once above its rate."
    )
    failed_auth_per_second: float = Field(
        default=1.0, ge=0,
        description="Wrong keys or signatures a second a client address may present on average "
        "once its burst is used; 0 switches the limit off.",
    )
    failed_auth_burst: int = Field(
        default=50, ge=1, description="Wrong keys or signatures an address may present at once."
    )
    max_waiting_posts: int = Field(
        default=2000, ge=1, description="Posts that may wait for the writer; more get 503."
    )
    max_waiting_respondents: int = Field(
        default=250_000, ge=1,
        description="Respondents that may wait for the writer over all posts; more get 503.",
    )
    log_format: Literal["json", "text"] = Field(
        default="json", description="`json`: one JSON object per log line; `text`: plain lines."
    )
    metrics_token: str | None = Field(
        default=None,
        min_length=16,
        description=(
            "Bearer token that `GET /metrics` requires. Unset: `/metrics` answers requests from "
            "the loopback address only."
        ),
    )

    sync_limit_respondents: int = Field(
        default=50_000, ge=0,
        description="Surveys with more stored respondents than this get a background job "
        "(202) from the re-screen, report and export endpoints instead of the result.",
    )
    job_broker: str | None = Field(
        default=None,
        description="Redis URL of the job queue shared by several replicas and `heedful worker` "
        "processes (redis://HOST:6379/0). Unset: a queue file in the job folder.",
    )
    job_queue_name: str = Field(
        default="heedful", min_length=1, max_length=100,
        description="Name of the job queue (the prefix of its keys in Redis).",
    )
    job_folder: str | None = Field(
        default=None,
        description="Folder of job results (and of the queue file without a broker); shared by "
        "every replica and worker. Unset: beside a SQLite database (`heedful-jobs` beside "
        "`heedful.db`), else ./heedful-jobs.",
    )
    job_workers: int = Field(
        default=1, ge=0, le=32,
        description="Threads of `heedful serve` that run jobs; 0 leaves them to `heedful worker`.",
    )
    job_stale_seconds: float = Field(
        default=300.0, gt=0,
        description="A running job whose worker has not been heard from for this long is stale.",
    )
    job_attempts: int = Field(
        default=3, ge=1,
        description="Times a job is started before a stale one is marked failed.",
    )
    job_keep_days: float = Field(
        default=30.0, ge=0,
        description="A job that ended (done, failed, cancelled) is deleted with its result "
        "file this many days later; 0 keeps them.",
    )
    review_session_minutes: int = Field(
        default=480, ge=1, le=7 * 24 * 60,
        description="A review-page session ends this many minutes after signing in.",
    )

    @field_validator("job_broker")
    @classmethod
    def _redis_broker(cls, value: str | None) -> str | None:
        if value is not None and not value.startswith(("redis://", "rediss://", "unix://")):
            raise ValueError("job_broker must be a Redis URL: redis://HOST:6379/0")
        return value

    @field_validator("database_url")
    @classmethod
    def _supported_database(cls, value: str) -> str:
        driver = value.split("://", 1)[0] if "://" in value else ""
        if driver not in SUPPORTED_DRIVERS:
            raise ValueError(
                f"unsupported database URL {driver or value!r}; use sqlite:///FILE or "
                "postgresql+psycopg://USER@HOST/DB"
            )
        return value

    @field_validator("log_level")
    @classmethod
    def _known_level(cls, value: str) -> str:
        levels = ("critical", "error", "warning", "info", "debug")
        if value.lower() not in levels:
            raise ValueError(f"log_level must be one of {', '.join(levels)}")
        return value.lower()


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """The settings of this process, read from the environment on first use."""
    return Settings()
