"""Users, passwords, roles, API tokens and sessions: every change, and its audit row.

Passwords are stored as werkzeug.security hashes (salted, scrypt/pbkdf2). An API token is
``secrets.token_urlsafe(32)`` shown once; only its sha256 hex digest is stored, so a
leaked database does not leak usable tokens.

Each user has a ``session_version`` that every dashboard session carries; sign-out,
a password change or reset, a role change and disabling move it on, which ends every
session of that user at its next request. Each change here writes its
:mod:`monitor.store.audit` row in the caller's transaction; ``by`` says who made it and
from where (the command line when not given).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import re
import secrets

from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session
from werkzeug.security import check_password_hash, generate_password_hash

from monitor.store import audit
from monitor.store.audit import Actor, local_actor
from monitor.store.models import ROLES, ApiToken, User, utcnow
from monitor.store.reads.people import get_user

_NAME = re.compile(r"^[A-Za-z0-9_.@-]{1,100}$")
# OWASP ASVS 4.0.3 V2.1.1 (at least 12 characters) and V2.1.2 (64 allowed, over 128 refused).
MIN_PASSWORD_LENGTH = 12
MAX_PASSWORD_LENGTH = 128
#: Sign-in addresses kept per user (the login limiter lets a correct password from one
#: of them past the per-account limit).
KNOWN_ADDRESSES_KEPT = 5
# Recording every use would turn each API read into a write; minutes are precise enough.
LAST_USE_RESOLUTION = dt.timedelta(minutes=10)
# Compared against when the user does not exist or is disabled, so the answer takes the
# same hashing time and timing does not reveal which names exist.
_DUMMY_HASH = generate_password_hash("not-a-real-password")


class AuthError(ValueError):
    """A user or token request is invalid; the message is one sentence."""


class LastAdminError(AuthError):
    """The change would leave no enabled admin to manage users."""


def hash_token(token: str) -> str:
    """sha256 hex digest of the token text."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def check_new_password(password: str) -> None:
    """Raise :class:`AuthError` unless ``password`` may be set (length only: ASVS V2.1.9
    asks for no composition rules)."""
    if not isinstance(password, str) or len(password) < MIN_PASSWORD_LENGTH:
        raise AuthError(f"the password must have at least {MIN_PASSWORD_LENGTH} characters.")
    if len(password) > MAX_PASSWORD_LENGTH:
        raise AuthError(f"the password must have at most {MAX_PASSWORD_LENGTH} characters.")


def create_user(session: Session, name: str, password: str, role: str = "viewer",
                by: Actor | None = None) -> User:
    """Add a user (inside the caller's transaction)."""
    if not _NAME.match(name or ""):
        raise AuthError(f"user name {name!r} must be 1-100 letters, digits or . _ @ -.")
    if role not in ROLES:
        raise AuthError(f"role {role!r} must be one of {', '.join(ROLES)}.")
    check_new_password(password)
    if get_user(session, name) is not None:
        raise AuthError(f"user {name!r} already exists.")
    user = User(name=name, password_hash=generate_password_hash(password), role=role)
    session.add(user)
    session.flush()
    audit.record(session, by or local_actor(), "user_create", name, {"role": role})
    return user


def password_matches(user: User, password: str) -> bool:
    """True when ``password`` is ``user``'s (whether or not the user is disabled)."""
    return check_password_hash(user.password_hash, password)


def verify_password(session: Session, name: str, password: str) -> User | None:
    """The user when ``password`` is theirs and they are not disabled, else None; takes
    one password hash either way."""
    user = get_user(session, name)
    if user is None or user.disabled:
        check_password_hash(_DUMMY_HASH, password)
        return None
    return user if password_matches(user, password) else None


def _end_sessions(user: User) -> None:
    user.session_version = (user.session_version or 0) + 1


def _enabled_admins(session: Session) -> int:
    return int(session.scalar(select(func.count()).select_from(User).where(
        User.role == "admin", User.disabled.is_(False))) or 0)


def _keep_an_admin(session: Session, user: User, what: str) -> None:
    if user.role == "admin" and not user.disabled and _enabled_admins(session) <= 1:
        raise LastAdminError(f"{what} {user.name!r} would leave no enabled admin; make another user admin first.")


def set_password(session: Session, user: User, password: str, by: Actor | None = None) -> None:
    """Set ``user``'s password and end their sessions; recorded as a change when ``by`` is
    the user, else as a reset."""
    check_new_password(password)
    by = by or local_actor()
    user.password_hash = generate_password_hash(password)
    _end_sessions(user)
    audit.record(session, by, "password_change" if by.name == user.name else "password_reset", user.name)


def set_role(session: Session, user: User, role: str, by: Actor | None = None) -> bool:
    """Give ``user`` ``role`` and end their sessions; False when it was their role already."""
    if role not in ROLES:
        raise AuthError(f"role {role!r} must be one of {', '.join(ROLES)}.")
    if role == user.role:
        return False
    if role != "admin":
        _keep_an_admin(session, user, "taking the admin role from")
    old, user.role = user.role, role
    _end_sessions(user)
    audit.record(session, by or local_actor(), "role_change", user.name, {"from": old, "to": role})
    return True


def set_disabled(session: Session, user: User, disabled: bool, by: Actor | None = None) -> bool:
    """Disable (ending sessions; tokens stop working) or re-enable ``user``; False when
    nothing changed."""
    if bool(user.disabled) == disabled:
        return False
    if disabled:
        _keep_an_admin(session, user, "disabling")
    user.disabled = disabled
    _end_sessions(user)
    audit.record(session, by or local_actor(), "user_disable" if disabled else "user_enable", user.name)
    return True


def delete_user(session: Session, user: User, by: Actor | None = None) -> None:
    """Delete ``user`` and their API tokens; their audit rows stay."""
    _keep_an_admin(session, user, "deleting")
    audit.record(session, by or local_actor(), "user_delete", user.name, {"role": user.role})
    session.execute(delete(ApiToken).where(ApiToken.user_id == user.id))
    session.delete(user)
    session.flush()


def sign_in(session: Session, user: User, by: Actor) -> None:
    """Record a successful sign-in from ``by.address`` and remember the address."""
    kept = [a for a in (user.known_addresses or []) if a != by.address]
    user.known_addresses = (kept + [by.address])[-KNOWN_ADDRESSES_KEPT:]
    audit.record(session, by, "sign_in", user.name)


def sign_out(session: Session, user: User, by: Actor) -> None:
    """End every session of ``user`` (a saved session cookie stops working)."""
    _end_sessions(user)
    audit.record(session, by, "sign_out", user.name)


def signed_in_before_from(session: Session, name: str, address: str) -> bool:
    """True when user ``name`` signed in successfully from ``address`` lately."""
    user = get_user(session, name)
    return user is not None and not user.disabled and address in (user.known_addresses or [])


# ----------------------------------------------------------------------------- API tokens


def create_api_token(session: Session, user_name: str, label: str = "", by: Actor | None = None) -> str:
    """Create an API token for ``user_name``; returns the token text (shown once)."""
    user = get_user(session, user_name)
    if user is None:
        raise AuthError(f"no user named {user_name!r}; add one with `whirlwatch user add`.")
    token = secrets.token_urlsafe(32)
    row = ApiToken(token_hash=hash_token(token), user_id=user.id, label=label)
    session.add(row)
    session.flush()
    audit.record(session, by or local_actor(), "token_create", user.name, {"token_id": row.id, "label": label})
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


def _revoke(session: Session, row: ApiToken | None, by: Actor | None) -> bool:
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = utcnow()
    audit.record(session, by or local_actor(), "token_revoke", row.user.name,
                 {"token_id": row.id, "label": row.label})
    return True


def revoke_api_token(session: Session, token: str, by: Actor | None = None) -> bool:
    """Revoke ``token``; False when it is unknown or already revoked."""
    row = session.execute(
        select(ApiToken).where(ApiToken.token_hash == hash_token(token))
    ).scalar_one_or_none()
    return _revoke(session, row, by)


def revoke_api_token_by_id(session: Session, token_id: int, by: Actor | None = None) -> bool:
    """Revoke the token with database id ``token_id`` (admins never see the token text);
    False when it is unknown or already revoked."""
    return _revoke(session, session.get(ApiToken, token_id), by)

