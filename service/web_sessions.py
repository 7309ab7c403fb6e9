"""Sessions of the review pages: an analyst key exchanged for a cookie that expires.

A session token looks like an API token (``hf_<lookup>_<secret>``, :mod:`service.security`):
the lookup part finds the row, only the hash of the whole token is stored. Each session has a
form token of its own that every form of the pages carries (the check against cross-site
forms). A session ends when it is signed out, when it expires, or when its key is revoked.
Only analyst and admin keys can sign in; the pages offer analyst actions only.
"""

from __future__ import annotations

import datetime as dt
import secrets
from dataclasses import dataclass

from sqlalchemy.orm import Session

from . import store
from .db import utcnow
from .errors import SignInRefused
from .models import Role
from .security import new_token, token_lookup, tokens_match

__all__ = ["NewSession", "ActiveSession", "sign_in", "session_of", "sign_out", "SIGN_IN_ROLES"]

#: Roles that can open a session of the review pages.
SIGN_IN_ROLES = (Role.ANALYST, Role.ADMIN)


@dataclass(frozen=True)
class NewSession:
    token: str  # the cookie's value; shown once, never stored
    form_token: str
    expires_at: dt.datetime
    name: str
    role: Role


@dataclass(frozen=True)
class ActiveSession:
    name: str  # the key's name, recorded as reviewer
    role: Role
    form_token: str
    expires_at: dt.datetime


def sign_in(session: Session, key: str, minutes: int) -> NewSession:
    """Open a session for an analyst (or admin) key; refuses other keys with one message for
    unknown and revoked ones."""
    key = key.strip()
    lookup = token_lookup(key)
    row = store.find_key(session, lookup) if lookup is not None else None
    if row is None or not tokens_match(key, row.token_hash):
        raise SignInRefused("unknown-key", "This key is not valid or has been revoked.")
    role = Role(row.role)
    if role not in SIGN_IN_ROLES:
        raise SignInRefused(
            "wrong-role",
            f"This key has the role {role.value!r}; only analyst keys can sign in to review.",
        )
    now = utcnow()
    store.prune_web_sessions(session, now)
    token = new_token()
    form_token = secrets.token_urlsafe(32)
    expires_at = now + dt.timedelta(minutes=minutes)
    store.add_web_session(session, row.id, token.lookup, token.token_hash, form_token, expires_at)
    return NewSession(token.token, form_token, expires_at, row.name, role)


def session_of(session: Session, token: str | None) -> ActiveSession | None:
    """The active session behind a cookie's token, or None (absent, ended, expired, revoked)."""
    if not token:
        return None
    lookup = token_lookup(token)
    if lookup is None:
        return None
    row = store.find_web_session(session, lookup, utcnow())
    if row is None or not tokens_match(token, row.token_hash):
        return None
    return ActiveSession(row.name, Role(row.role), row.form_token, row.expires_at)


def sign_out(session: Session, token: str | None) -> None:
    """End the session behind a cookie's token (nothing happens for an unknown one)."""
    lookup = token_lookup(token) if token else None
    if lookup is not None:
        row = store.find_web_session(session, lookup, utcnow())
        if row is not None and tokens_match(token or "", row.token_hash):
            store.end_web_session(session, lookup)
