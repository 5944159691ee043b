"""Users and roles: ``lead`` decides gates, waivers and rule settings; ``scientist`` records
data; ``viewer`` reads.

Roles are enforced here, in the service layer that both the CLI and the
dashboard call: every write takes the acting user's name and checks its role
with :func:`require_role`.  *Who* that user is, is established by the front
ends before they call a service: the CLI by a ``krt login`` session
(:func:`start_session` / :func:`session_user`), the dashboard by its sign-in
form (:func:`authenticate`) or by OIDC in team mode.

Credentials: a password is stored only as an argon2id hash (``argon2-cffi``'s
``PasswordHasher``; PHC string with its own salt and parameters), rehashed on
the next successful check when the parameters change.  A command-line session
is a random 256-bit token kept in the user's private session file; the
database stores only its SHA-256 and expiry, so editing the file cannot forge
a session.  Gate decisions and waivers are *signed*: the password is
re-entered at that moment and checked by :func:`verify_signer` (21 CFR
Part 11 §11.200(a)(1)).

Bootstrap: while the ``users`` table is empty, anyone may add the first user,
and that first user must be a ``lead`` (otherwise nobody could ever pass a gate
or add a lead).  From then on only an active lead may add users, change roles or
deactivate users, and the last active lead can be neither demoted nor
deactivated.  Users are never deleted (their names stay attributable in the
audit trail); deactivation removes their rights.  Every change appends an
audit event in the same transaction.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import secrets
from collections.abc import Callable
from functools import lru_cache
from typing import Any, TypeVar

import pandas as pd
from sqlalchemy import Engine, delete, func, insert, select, update
from sqlalchemy.orm import Session

from ..db import queries
from ..db.audit import append_event
from ..db.models import LoginSession, User, utcnow
from ..db.session import with_retry
from ..db.uow import UnitOfWork
from ..domain import ROLES
from ..errors import InputError, NotFoundError, PermissionDenied

__all__ = ["add_user", "list_users", "set_role", "deactivate_user", "require_role", "get_user", "run_write", "ROLES",
           "set_password", "authenticate", "verify_signer", "start_session", "session_user", "end_session", "user_count",
           "hash_password", "MIN_PASSWORD", "DEFAULT_SESSION_HOURS"]

T = TypeVar("T")
MAX_NAME = 100
#: shortest password accepted (NIST SP 800-63B §5.1.1.2: at least 8 characters for a user-chosen secret)
MIN_PASSWORD = 8
MAX_PASSWORD = 1024
#: lifetime of a command-line session unless configured otherwise (``krt login --hours``, ``$KRT_SESSION_HOURS``)
DEFAULT_SESSION_HOURS = 8.0
MAX_SESSION_HOURS = 24.0 * 30
BAD_CREDENTIALS = "user name or password is wrong"


def run_write(target: Engine | UnitOfWork, fn: Callable[[Session], T]) -> T:
    """Run ``fn(session)`` in a writing transaction.

    With an engine: a new unit of work, committed, retried on transient lock
    errors.  With an open :class:`UnitOfWork`: inside it; the caller commits.
    """
    if isinstance(target, UnitOfWork):
        return fn(target.session)

    def attempt():
        with UnitOfWork(target) as uow:
            out = fn(uow.session)
            uow.commit()
            return out

    return with_retry(attempt)


def _clean_name(name: str) -> str:
    text = " ".join(str(name or "").split())
    if not text:
        raise InputError("user name must not be empty")
    if len(text) > MAX_NAME:
        raise InputError(f"user name is longer than {MAX_NAME} characters")
    return text


def _role(role: str) -> str:
    r = str(role or "").strip().lower()
    if r not in ROLES:
        raise InputError(f"unknown role {role!r}: use one of {', '.join(ROLES)}")
    return r


def get_user(session: Session, name: str) -> dict[str, Any] | None:
    row = session.execute(select(User.id, User.name, User.role, User.active, User.full_name).where(User.name == name)).first()
    return None if row is None else dict(row._mapping)


def require_role(session: Session, name: str | None, roles: tuple[str, ...], action: str) -> dict[str, Any]:
    """The active user ``name`` if their role is one of ``roles``; else :class:`PermissionDenied`.

    The one role check of every write (import, fit save, gate, waiver, rules, users, actions, restore).
    """
    if not name:
        raise PermissionDenied(f"{action} needs a signed-in user (run 'krt login NAME' first)")
    user = get_user(session, name)
    if user is None:
        raise PermissionDenied(f"unknown user {name!r}: {action} needs a registered {' or '.join(roles)}")
    if not user["active"]:
        raise PermissionDenied(f"user {name!r} is deactivated and may not {action}")
    if user["role"] not in roles:
        raise PermissionDenied(f"user {name!r} is a {user['role']}; only a {' or '.join(roles)} may {action}")
    return user


def _public(user: dict[str, Any]) -> dict[str, Any]:
    return {"name": user["name"], "role": user["role"], "active": bool(user["active"])}


# ------------------------------------------------------------------ passwords
@lru_cache(maxsize=1)
def _hasher():
    from argon2 import PasswordHasher

    return PasswordHasher()  # argon2id with the library's current RFC 9106 low-memory profile


@lru_cache(maxsize=1)
def _dummy_hash() -> str:
    return _hasher().hash(secrets.token_urlsafe(16))


def _clean_password(password: str | None) -> str:
    if password is None:
        raise InputError("a password is needed")
    pw = str(password)
    if len(pw) < MIN_PASSWORD:
        raise InputError(f"the password is too short: use at least {MIN_PASSWORD} characters")
    if len(pw) > MAX_PASSWORD:
        raise InputError(f"the password is longer than {MAX_PASSWORD} characters")
    return pw


def hash_password(password: str) -> str:
    """The argon2id hash of ``password`` (length checked first)."""
    return _hasher().hash(_clean_password(password))


def _password_ok(stored: str | None, password: str) -> bool:
    from argon2.exceptions import InvalidHashError, VerificationError

    try:
        return bool(_hasher().verify(stored or _dummy_hash(), str(password or ""))) and stored is not None
    except (VerificationError, InvalidHashError):
        return False


def _check_credentials(session: Session, name: str | None, password: str | None, writable: bool) -> dict[str, Any]:
    """The active user ``name`` if ``password`` is theirs, else :class:`PermissionDenied` (one message for
    unknown name and wrong password, and the same work for both).  Rehashes an outdated hash when ``writable``."""
    name = " ".join(str(name or "").split())
    row = session.execute(select(User.id, User.name, User.role, User.active, User.full_name, User.password_hash)
                          .where(User.name == name)).first() if name else None
    if not _password_ok(row.password_hash if row is not None else None, password or ""):
        if row is not None and row.password_hash is None:
            raise PermissionDenied(f"user {name!r} has no password yet: set one with 'krt user password {name} --password-stdin'")
        raise PermissionDenied(BAD_CREDENTIALS)
    if not row.active:
        raise PermissionDenied(f"user {name!r} is deactivated")
    if writable and _hasher().check_needs_rehash(row.password_hash):
        session.execute(update(User).where(User.id == row.id).values(password_hash=_hasher().hash(password)))
    return {k: row._mapping[k] for k in ("id", "name", "role", "active", "full_name")}


def authenticate(target: Engine | UnitOfWork, name: str, password: str) -> dict[str, Any]:
    """Check a sign-in: ``{id, name, role, active, full_name}`` of the active user, else :class:`PermissionDenied`."""
    return run_write(target, lambda session: _check_credentials(session, name, password, writable=True))


def verify_signer(session: Session, name: str, password: str | None, roles: tuple[str, ...], action: str) -> dict[str, Any]:
    """An electronic signature's check, inside the writing transaction that records it: ``password`` must be
    re-entered now (21 CFR Part 11 §11.200(a)(1)) and ``name`` must hold one of ``roles``."""
    if not password:
        raise PermissionDenied(f"the signature is missing: re-enter the password of {name!r} to {action} "
                               "(--password-stdin, or at the prompt)")
    user = _check_credentials(session, name, password, writable=True)
    require_role(session, user["name"], roles, action)
    return user


def printed_name(user: dict[str, Any]) -> str:
    return str(user.get("full_name") or user["name"])


def user_count(bind) -> tuple[int, int]:
    """``(users, users with a password)``."""
    def run(session: Session) -> tuple[int, int]:
        n = session.execute(select(func.count()).select_from(User)).scalar_one()
        with_pw = session.execute(select(func.count()).select_from(User).where(User.password_hash.is_not(None))).scalar_one()
        return int(n), int(with_pw)

    if isinstance(bind, UnitOfWork):
        return run(bind.session)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def set_password(target: Engine | UnitOfWork, name: str, password: str, by: str | None, reason: str | None = None) -> dict[str, Any]:
    """Set ``name``'s password: by themself or by a lead.

    Bootstrap of a database that has users but no passwords yet (created before
    sign-in existed): while no user has a password, an active lead's first
    password may be set without a signed-in user, like the first user of an
    empty database.  Audited without the hash.
    """
    name = _clean_name(name)
    pw_hash = hash_password(password)

    def run(session: Session) -> dict[str, Any]:
        user = get_user(session, name)
        if user is None:
            raise NotFoundError(f"no user named {name!r}")
        any_pw = session.execute(select(func.count()).select_from(User).where(User.password_hash.is_not(None))).scalar_one()
        if any_pw == 0 and not by:
            if user["role"] != "lead" or not user["active"]:
                raise PermissionDenied(f"no user has a password yet: set an active lead's password first (not {name!r})")
            actor, why = name, reason or "first password (bootstrap)"
        elif by == name:
            actor, why = require_role(session, by, ROLES, "change their password")["name"], reason
        else:
            actor, why = require_role(session, by, ("lead",), "set other users' passwords")["name"], reason
        session.execute(update(User).where(User.id == user["id"]).values(password_hash=pw_hash))
        session.execute(delete(LoginSession).where(LoginSession.user_id == user["id"]))  # old sessions end
        append_event(session, actor, "set-password", "user", user["id"], None, {"name": name, "password": "changed"}, why)
        return _public(user)

    return run_write(target, run)


# ------------------------------------------------------------------ command-line sessions
def _token_hash(token: str) -> str:
    return hashlib.sha256(str(token).encode("utf-8")).hexdigest()


def session_hours(hours: float | str | None) -> float:
    """A session lifetime in hours, checked (``None`` -> :data:`DEFAULT_SESSION_HOURS`)."""
    if hours is None or hours == "":
        return DEFAULT_SESSION_HOURS
    try:
        h = float(hours)
    except (TypeError, ValueError):
        raise InputError(f"session lifetime {hours!r} is not a number of hours") from None
    if not (0 < h <= MAX_SESSION_HOURS):
        raise InputError(f"session lifetime {hours!r} h must be above 0 and at most {MAX_SESSION_HOURS:g} h")
    return h


def start_session(target: Engine | UnitOfWork, name: str, password: str, hours: float | None = None) -> dict[str, Any]:
    """Sign ``name`` in: ``{token, name, role, expires_at}``.  Only the token's SHA-256 is stored."""
    h = session_hours(hours)

    def run(session: Session) -> dict[str, Any]:
        user = _check_credentials(session, name, password, writable=True)
        now = utcnow()
        session.execute(delete(LoginSession).where(LoginSession.user_id == user["id"], LoginSession.expires_at < now))
        token = secrets.token_urlsafe(32)
        expires = now + dt.timedelta(hours=h)
        session.execute(insert(LoginSession), [{"user_id": user["id"], "token_hash": _token_hash(token), "created_at": now,
                                                "expires_at": expires}])
        return {"token": token, "name": user["name"], "role": user["role"], "expires_at": expires}

    return run_write(target, run)


def session_user(bind, token: str | None) -> dict[str, Any]:
    """The active user of a live session token, else :class:`PermissionDenied` (unknown, ended or expired)."""
    if not token:
        raise PermissionDenied("nobody is signed in to this database: run 'krt login NAME' first")

    def run(session: Session) -> dict[str, Any]:
        row = session.execute(
            select(LoginSession.expires_at, User.id, User.name, User.role, User.active, User.full_name)
            .join(User, User.id == LoginSession.user_id).where(LoginSession.token_hash == _token_hash(token))).first()
        if row is None:
            raise PermissionDenied("your sign-in is not valid for this database (ended or never started): run 'krt login NAME'")
        if row.expires_at <= utcnow():
            raise PermissionDenied(f"your sign-in as {row.name!r} expired at {row.expires_at:%Y-%m-%d %H:%M} UTC: "
                                   f"run 'krt login {row.name}' again")
        if not row.active:
            raise PermissionDenied(f"user {row.name!r} is deactivated")
        return {"id": row.id, "name": row.name, "role": row.role, "active": row.active, "full_name": row.full_name,
                "expires_at": row.expires_at}

    if isinstance(bind, UnitOfWork):
        return run(bind.session)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def end_session(target: Engine | UnitOfWork, token: str | None) -> bool:
    """End a session (``krt logout``); True when one was live."""
    if not token:
        return False
    return bool(run_write(target, lambda s: s.execute(delete(LoginSession).where(LoginSession.token_hash == _token_hash(token))).rowcount))


# ------------------------------------------------------------------ users
def add_user(target: Engine | UnitOfWork, name: str, role: str, by: str | None = None, reason: str | None = None,
             password: str | None = None, full_name: str | None = None) -> dict[str, Any]:
    """Add a user; returns ``{id, name, role, active}``.

    The first user of an empty database must be a ``lead`` and is recorded as
    having added themself; afterwards ``by`` must be an active lead.
    ``password`` (stored as its argon2 hash) lets the user sign in and sign;
    ``full_name`` is the printed name on their signatures (default: ``name``).
    """
    name, role = _clean_name(name), _role(role)
    pw_hash = hash_password(password) if password is not None else None
    full = " ".join(str(full_name or "").split())[:200] or None

    def run(session: Session) -> dict[str, Any]:
        n_users = session.execute(select(func.count()).select_from(User)).scalar_one()
        if n_users == 0:
            if role != "lead":
                raise PermissionDenied(f"the first user must be a lead (got role {role!r}): add a lead first, e.g. 'krt user add NAME --role lead'")
            actor = by or name
            why = reason or "first user (bootstrap)"
        else:
            actor = require_role(session, by, ("lead",), "add users")["name"]
            why = reason
        if get_user(session, name) is not None:
            raise InputError(f"user {name!r} already exists")
        uid = session.execute(insert(User).returning(User.id), [{"name": name, "role": role, "active": True, "created_at": utcnow(),
                                                                 "password_hash": pw_hash, "full_name": full}]).scalar_one()
        user = {"id": uid, "name": name, "role": role, "active": True}
        append_event(session, actor, "create", "user", uid, None, _public(user), why)
        return user

    return run_write(target, run)


def _count_active_leads(session: Session) -> int:
    return session.execute(select(func.count()).select_from(User).where(User.role == "lead", User.active.is_(True))).scalar_one()


def set_role(target: Engine | UnitOfWork, name: str, role: str, by: str, reason: str | None = None) -> dict[str, Any]:
    """Change a user's role (leads only; the last active lead cannot be demoted)."""
    name, role = _clean_name(name), _role(role)

    def run(session: Session) -> dict[str, Any]:
        actor = require_role(session, by, ("lead",), "change roles")["name"]
        user = get_user(session, name)
        if user is None:
            raise NotFoundError(f"no user named {name!r}")
        if user["role"] == role:
            return user
        if user["role"] == "lead" and user["active"] and _count_active_leads(session) <= 1:
            raise PermissionDenied(f"{name!r} is the last active lead; add another lead before changing this role")
        session.execute(update(User).where(User.id == user["id"]).values(role=role))
        after = dict(user, role=role)
        append_event(session, actor, "update", "user", user["id"], _public(user), _public(after), reason)
        return after

    return run_write(target, run)


def deactivate_user(target: Engine | UnitOfWork, name: str, by: str, reason: str | None = None) -> dict[str, Any]:
    """Deactivate a user (leads only; never the last active lead).  The name stays in the records."""
    name = _clean_name(name)

    def run(session: Session) -> dict[str, Any]:
        actor = require_role(session, by, ("lead",), "deactivate users")["name"]
        user = get_user(session, name)
        if user is None:
            raise NotFoundError(f"no user named {name!r}")
        if not user["active"]:
            return user
        if user["role"] == "lead" and _count_active_leads(session) <= 1:
            raise PermissionDenied(f"{name!r} is the last active lead and cannot be deactivated")
        session.execute(update(User).where(User.id == user["id"]).values(active=False))
        after = dict(user, active=False)
        append_event(session, actor, "deactivate", "user", user["id"], _public(user), _public(after), reason)
        return after

    return run_write(target, run)


def list_users(bind) -> pd.DataFrame:
    """Every user: id, name, role, active, created_at."""
    return queries.users(bind)
