"""API tokens and webhook signatures.

Tokens look like ``hf_<lookup>_<secret>``: the lookup part finds the stored row, the whole token
is hashed with sha256 (enough for 256 random bits; a slow password hash buys nothing here) and
the hashes are compared in constant time. Only the hash is stored.

Webhook signatures follow the Standard Webhooks specification: the signed content is
``{webhook-id}.{webhook-timestamp}.{body}``, signed with HMAC-SHA256 under the base64-decoded
part of a ``whsec_`` secret, and sent as ``v1,<base64 signature>`` (several may be given,
separated by spaces, e.g. while a secret is being rotated).
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import secrets
import time
from collections.abc import Iterable
from dataclasses import dataclass

__all__ = [
    "NewToken",
    "new_token",
    "token_lookup",
    "hash_token",
    "tokens_match",
    "new_webhook_secret",
    "sign_webhook",
    "verify_webhook",
    "WebhookRejected",
]

TOKEN_PREFIX = "hf_"
#: 32 random bytes per token and per webhook secret (256 bits; common practice, no source).
SECRET_BYTES = 32
WEBHOOK_SECRET_PREFIX = "whsec_"


@dataclass(frozen=True)
class NewToken:
    token: str
    lookup: str
    token_hash: str


def new_token() -> NewToken:
    lookup = secrets.token_hex(6)
    token = f"{TOKEN_PREFIX}{lookup}_{secrets.token_urlsafe(SECRET_BYTES)}"
    return NewToken(token=token, lookup=lookup, token_hash=hash_token(token))


def token_lookup(token: str) -> str | None:
    """The lookup part of a well-formed token, else None."""
    if not token.startswith(TOKEN_PREFIX):
        return None
    lookup, sep, rest = token[len(TOKEN_PREFIX) :].partition("_")
    if not sep or len(lookup) != 12 or not rest:
        return None
    return lookup


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def tokens_match(token: str, stored_hash: str) -> bool:
    return hmac.compare_digest(hash_token(token), stored_hash)


# Webhooks ---------------------------------------------------------------------------------------


def new_webhook_secret() -> str:
    return WEBHOOK_SECRET_PREFIX + base64.b64encode(secrets.token_bytes(SECRET_BYTES)).decode()


def _key(secret: str) -> bytes:
    return base64.b64decode(secret.removeprefix(WEBHOOK_SECRET_PREFIX))


def sign_webhook(secret: str, webhook_id: str, timestamp: int | str, body: bytes) -> str:
    """The ``webhook-signature`` header value for a body (what a sender computes)."""
    content = f"{webhook_id}.{timestamp}.".encode() + body
    digest = hmac.new(_key(secret), content, hashlib.sha256).digest()
    return "v1," + base64.b64encode(digest).decode()


class WebhookRejected(Exception):
    """A signed delivery failed verification; ``reason`` says why (safe to show the sender)."""

    def __init__(self, reason: str, code: str):
        self.reason = reason
        #: A short word for logs and metrics: missing-headers, bad-timestamp, stale-timestamp,
        #: no-signature, signature-mismatch.
        self.code = code
        super().__init__(reason)


#: The refusal of a signature that verifies under none of the survey's secrets (also given for
#: a survey that does not exist, so that forged posts cannot list surveys).
NO_MATCH = "no signature matches the survey's webhook secret"


def check_webhook_headers(
    webhook_id: str | None,
    timestamp: str | None,
    signature_header: str | None,
    tolerance_seconds: int,
    now: float | None = None,
) -> list[bytes]:
    """What can be checked before the body is read: the three headers are present, the
    timestamp lies within ``tolerance_seconds`` of now (either way), and at least one ``v1``
    signature is offered. Returns the offered signatures; raises :class:`WebhookRejected`."""
    missing = [
        name
        for name, value in (
            ("webhook-id", webhook_id),
            ("webhook-timestamp", timestamp),
            ("webhook-signature", signature_header),
        )
        if not value
    ]
    if missing:
        raise WebhookRejected(f"missing header(s): {', '.join(missing)}", "missing-headers")
    assert webhook_id is not None and timestamp is not None and signature_header is not None
    if not timestamp.isdigit():
        raise WebhookRejected(
            "webhook-timestamp must be whole seconds since 1970-01-01 UTC", "bad-timestamp"
        )
    now = time.time() if now is None else now
    if abs(now - int(timestamp)) > tolerance_seconds:
        raise WebhookRejected(
            f"webhook-timestamp is more than {tolerance_seconds} seconds away from the "
            "server's clock",
            "stale-timestamp",
        )
    offered = []
    for part in signature_header.split():
        version, sep, value = part.partition(",")
        if sep and version == "v1":
            try:
                offered.append(base64.b64decode(value, validate=True))
            except (binascii.Error, ValueError):
                continue
    if not offered:
        raise WebhookRejected("webhook-signature holds no v1 signature", "no-signature")
    return offered


def verify_webhook(
    secrets_to_try: Iterable[str],
    webhook_id: str | None,
    timestamp: str | None,
    signature_header: str | None,
    body: bytes,
    tolerance_seconds: int,
    now: float | None = None,
) -> None:
    """Raise :class:`WebhookRejected` unless one ``v1`` signature verifies under one secret and
    the timestamp lies within ``tolerance_seconds`` of now (either way)."""
    offered = check_webhook_headers(webhook_id, timestamp, signature_header, tolerance_seconds, now)
    content = f"{webhook_id}.{timestamp}.".encode() + body
    for secret in secrets_to_try:
        expected = hmac.new(_key(secret), content, hashlib.sha256).digest()
        # Check every offered signature, so timing does not tell which one was close.
        if any([hmac.compare_digest(expected, candidate) for candidate in offered]):
            return
    raise WebhookRejected(NO_MATCH, "signature-mismatch")
