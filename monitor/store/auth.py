"""Users, passwords and API tokens.

Passwords are stored as werkzeug.security hashes (salted, scrypt/pbkdf2). An API token is
``secrets.token_urlsafe(32)`` shown once; only its sha256 hex digest is stored, so a
leaked database does not leak usable tokens.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import re
import secrets

from sqlalchemy import select
from sqlalchemy.orm import Session
from werkzeug.security import check_password_hash, generate_password_hash

from monitor.store.models import ROLES, ApiToken, User, utcnow

_NAME = re.compile(r"^[A-Za-z0-9_.@-]{1,100}$")
MIN_PASSWORD_LENGTH = 8
# Recording every use would turn each API read into a write; minutes are precise enough.
LAST_USE_RESOLUTION = dt.timedelta(minutes=10)


class AuthError(ValueError):
    """A user or token request is invalid; the message is one sentence."""


def hash_token(token: str) -> str:
    """sha256 hex digest of the token text."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def get_user(session: Session, name: str) -> User | None:
    return session.execute(select(User).where(User.name == name)).scalar_one_or_none()


def create_user(session: Session, name: str, password: str, role: str = "viewer") -> User:
    """Add a user (inside the caller's transaction)."""
    if not _NAME.match(name or ""):
        raise AuthError(f"user name {name!r} must be 1-100 letters, digits or . _ @ -.")
    if role not in ROLES:
        raise AuthError(f"role {role!r} must be one of {', '.join(ROLES)}.")
    if len(password) < MIN_PASSWORD_LENGTH:
        raise AuthError(f"the password must have at least {MIN_PASSWORD_LENGTH} characters.")
    if get_user(session, name) is not None:
        raise AuthError(f"user {name!r} already exists.")
    user = User(name=name, password_hash=generate_password_hash(password), role=role)
    session.add(user)
    session.flush()
    return user


def set_password(session: Session, name: str, password: str) -> User:
    user = get_user(session, name)
    if user is None:
        raise AuthError(f"no user named {name!r}.")
    if len(password) < MIN_PASSWORD_LENGTH:
        raise AuthError(f"the password must have at least {MIN_PASSWORD_LENGTH} characters.")
    user.password_hash = generate_password_hash(password)
    return user


def verify_password(session: Session, name: str, password: str) -> User | None:
    """The user when ``password`` is theirs and they are not disabled, else None."""
    user = get_user(session, name)
    if user is None or user.disabled:
        return None
    return user if check_password_hash(user.password_hash, password) else None


def create_api_token(session: Session, user_name: str, label: str = "") -> str:
    """Create an API token for ``user_name``; returns the token text (shown once)."""
    user = get_user(session, user_name)
    if user is None:
        raise AuthError(f"no user named {user_name!r}; add one with `whirlwatch user add`.")
    token = secrets.token_urlsafe(32)
    session.add(ApiToken(token_hash=hash_token(token), user_id=user.id, label=label))
    session.flush()
    return token


def verify_api_token(session: Session, token: str) -> User | None:
    """The user owning ``token`` when it is known, not revoked and the user not
    disabled; else None. Records the time of use to within ``LAST_USE_RESOLUTION``."""
    if not token:
        return None
    digest = hash_token(token)
    row = session.execute(
        select(ApiToken).where(ApiToken.token_hash == digest)
    ).scalar_one_or_none()
    # The lookup is by digest; compare again in constant time for good measure.
    if row is None or not hmac.compare_digest(row.token_hash, digest) or row.revoked_at:
        return None
    if row.user.disabled:
        return None
    now = utcnow()
    last = row.last_used_at
    if last is not None and last.tzinfo is None:  # SQLite returns naive UTC
        last = last.replace(tzinfo=dt.UTC)
    if last is None or now - last >= LAST_USE_RESOLUTION:
        row.last_used_at = now
    return row.user


def revoke_api_token(session: Session, token: str) -> bool:
    """Revoke ``token``; False when it is unknown or already revoked."""
    row = session.execute(
        select(ApiToken).where(ApiToken.token_hash == hash_token(token))
    ).scalar_one_or_none()
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = utcnow()
    return True


def revoke_api_token_by_id(session: Session, token_id: int) -> bool:
    """Revoke the token with database id ``token_id`` (admins never see the token text);
    False when it is unknown or already revoked."""
    row = session.get(ApiToken, token_id)
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = utcnow()
    return True
