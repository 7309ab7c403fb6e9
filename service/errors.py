"""The service's domain errors: what a use case refuses, in the use case's words.

Use cases (``service.ingest``, ``service.rescreen``, ``service.registration``) raise these;
``service.problems`` alone turns them into RFC 9457 problem documents at the web edge, and
the command line prints them. ::

    ServiceError
     ├── UnknownSurvey        no survey registered under this id
     ├── UnknownRespondent    the survey has no respondent under this id
     ├── SignInRefused        a key that cannot open a review-page session
     ├── InvalidQuery         a listing asked for with a value it cannot use (names the field)
     ├── NoVersion            the survey has no registered version
     ├── RespondentConflict   respondents already stored with other answers (no replace)
     ├── SignatureRefused     a webhook signature that does not verify
     ├── TooManyRequests      a caller over its rate limit, or an address over its budget of
     │                        failed credentials
     ├── WriterBusy           too many posts already wait for the writer
     ├── WebhookIdReused      a webhook id already accepted with another body
     ├── UnknownJob           no background job under this id
     ├── JobNotDone           a job's result asked for before the job is done (or it failed)
     └── JobEnded             a job asked to stop after it ended
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "ServiceError",
    "UnknownSurvey",
    "UnknownRespondent",
    "InvalidQuery",
    "SignInRefused",
    "NoVersion",
    "RespondentConflict",
    "Conflict",
    "SignatureRefused",
    "TooManyRequests",
    "WriterBusy",
    "WebhookIdReused",
    "UnknownJob",
    "JobNotDone",
    "JobEnded",
    "CONFLICT_REASON",
]

#: Why a respondent of a post was refused as a conflict (the reply's and the problem's words).
CONFLICT_REASON = (
    "respondent already stored with different answers; post again with ?replace=true to "
    "replace them (the earlier answers are kept in history)"
)


class ServiceError(Exception):
    """Base of the service's domain errors."""


class UnknownSurvey(ServiceError):
    def __init__(self, survey: str):
        self.survey = survey
        super().__init__(f"No survey {survey!r} is registered.")


class UnknownRespondent(ServiceError):
    def __init__(self, survey: str, respondent: str):
        self.survey = survey
        self.respondent = respondent
        super().__init__(f"Survey {survey!r} has no respondent {respondent!r}.")


class InvalidQuery(ServiceError):
    """A listing's parameter that cannot be used: ``field`` names it, ``detail`` says why."""

    def __init__(self, field: str, detail: str, message: str | None = None):
        self.field = field
        self.detail = detail
        super().__init__(message or f"{field}: {detail}.")


class SignInRefused(ServiceError):
    """A key refused at the review pages' sign-in: unknown or revoked, or not an analyst's."""

    def __init__(self, code: str, message: str):
        self.code = code  # unknown-key or wrong-role (for logs)
        super().__init__(message)


class NoVersion(ServiceError):
    def __init__(self, survey: str):
        self.survey = survey
        super().__init__("The survey has no registered version.")


@dataclass(frozen=True)
class Conflict:
    """One respondent of a post already stored with other answers."""

    position: int  # 0-based position in the post
    respondent_id: str

    @property
    def row(self) -> int:
        return self.position + 1


class RespondentConflict(ServiceError):
    def __init__(self, conflicts: list[Conflict]):
        self.conflicts = conflicts
        super().__init__(
            f"{len(conflicts)} respondent(s) are already stored with different answers; "
            "nothing was stored."
        )


class SignatureRefused(ServiceError):
    def __init__(self, reason: str, code: str = "signature"):
        self.reason = reason
        self.code = code  # a short word for logs and metrics (security.WebhookRejected.code)
        super().__init__(f"The webhook signature was refused: {reason}.")


class TooManyRequests(ServiceError):
    def __init__(self, code: str, retry_after: int):
        self.code = code  # rate-limit or failed-credentials
        self.retry_after = retry_after
        what = (
            "This key (or, for signed posts, this survey) is over its rate limit"
            if code == "rate-limit"
            else "Too many wrong keys or signatures came from this address"
        )
        super().__init__(f"{what}; try again in {retry_after} s.")


class WriterBusy(ServiceError):
    def __init__(self, waiting_posts: int, waiting_respondents: int, retry_after: int):
        self.waiting_posts = waiting_posts
        self.waiting_respondents = waiting_respondents
        self.retry_after = retry_after
        super().__init__(
            f"{waiting_posts} post(s) with {waiting_respondents} respondent(s) already wait to be "
            f"stored; nothing was stored. Try again in {retry_after} s."
        )


class WebhookIdReused(ServiceError):
    def __init__(self, webhook_id: str):
        self.webhook_id = webhook_id
        super().__init__(
            "This webhook-id was already accepted with another body; nothing was stored. A "
            "retried delivery must carry the same body, a new message a new webhook-id."
        )


class UnknownJob(ServiceError):
    def __init__(self, job_id: str):
        self.job_id = job_id
        super().__init__("No background job is known under this id.")


class JobNotDone(ServiceError):
    def __init__(self, job_id: str, state: str, error: str | None = None):
        self.job_id = job_id
        self.state = state
        self.error = error
        if state == "failed":
            message = f"The job failed, so it has no result: {error or 'no reason recorded'}."
        elif state == "cancelled":
            message = f"The job was cancelled, so it has no result ({error or 'no reason'})."
        else:
            message = f"The job is {state}; its result is there once it is done."
        super().__init__(message)


class JobEnded(ServiceError):
    def __init__(self, job_id: str, state: str):
        self.job_id = job_id
        self.state = state
        super().__init__(f"The job has already ended ({state}); there is nothing to cancel.")
