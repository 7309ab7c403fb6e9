"""Helpers shared by the routers: reading JSON bodies within limits, OpenAPI error tables."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import orjson
from fastapi import Request

from ..problems import PROBLEM_JSON, Problem

__all__ = ["read_json", "errors", "EVIDENCE_NOTE"]

#: Said by every operation whose reply carries flags, verdicts or careless scores.
EVIDENCE_NOTE = (
    "Flags, verdicts and careless scores are evidence for a human decision, not a verdict on a "
    "person: read the evidence and record a review before excluding anyone or withholding an "
    "incentive, and do not act on them automatically."
)

_DESCRIPTIONS = {
    400: "Malformed JSON",
    401: "Missing, unknown or revoked key (or a bad webhook signature)",
    403: "The key's role does not allow this",
    404: "No such survey or respondent",
    406: "Unsupported Accept type",
    409: "Conflict with stored data",
    413: "Body too large or too many respondents",
    415: "Body is not JSON",
    422: "Invalid input; `errors` lists the fields at fault (the first 100 of a post's, with "
    "`problem_count`)",
    429: "Over the key's rate limit, or too many wrong keys from this address; see Retry-After",
    503: "Database unreachable, or too many posts waiting for the writer; see Retry-After",
}


def errors(
    *codes: int, also: Mapping[int | str, dict[str, Any]] | None = None
) -> dict[int | str, dict[str, Any]]:
    """OpenAPI responses entries: those of ``also`` (another success reply, say), then problem
    documents with these status codes (and 429 and 503 where a caller is checked)."""
    entries: dict[int | str, dict[str, Any]] = dict(also or {})
    if 401 in codes:  # whoever checks a caller may refuse one over its limits, or be unavailable
        codes = tuple(sorted({*codes, 429, 503}))
    for code in codes:
        entries[code] = {
            "description": _DESCRIPTIONS[code],
            "content": {PROBLEM_JSON: {"schema": {"$ref": "#/components/schemas/Problem"}}},
        }
    return entries


async def read_body(request: Request, limit: int) -> bytes:
    """The raw body, refused with 413 as soon as it exceeds ``limit`` bytes."""
    too_large = Problem(
        413, f"The body exceeds {limit} bytes (HEEDFUL_MAX_BODY_BYTES).", kind="body-too-large"
    )
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise too_large
    parts: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise too_large
        parts.append(chunk)
    return b"".join(parts)


def parse_json(body: bytes, content_type: str | None) -> Any:
    if content_type:
        media = content_type.split(";", 1)[0].strip().lower()
        if media != "application/json" and not media.endswith("+json"):
            raise Problem(
                415, f"Send the body as application/json, not {media}.", kind="not-json"
            )
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError as error:
        if isinstance(error.__cause__, UnicodeDecodeError) or "utf-8" in str(error).lower():
            raise Problem(400, "The body is not UTF-8 text.", kind="malformed-json") from None
        raise Problem(
            400,
            f"The body is not valid JSON (line {error.lineno}, column {error.colno}): {error.msg}.",
            kind="malformed-json",
        ) from None


async def read_json(request: Request, limit: int) -> tuple[bytes, Any]:
    body = await read_body(request, limit)
    return body, parse_json(body, request.headers.get("content-type"))
