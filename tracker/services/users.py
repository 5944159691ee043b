"""Users and roles: ``lead`` decides gates, waivers and rule settings; ``scientist`` records
data; ``viewer`` reads.

Roles are enforced here, in the service layer that both the CLI and the
dashboard call.  Identity is the name given (``--by`` on the CLI, the signed-in
user on the dashboard); this layer checks what that user may do, not who they
are.

Bootstrap: while the ``users`` table is empty, anyone may add the first user,
and that first user must be a ``lead`` (otherwise nobody could ever pass a gate
or add a lead).  From then on only an active lead may add users, change roles or
deactivate users, and the last active lead can be neither demoted nor
deactivated.  Users are never deleted (their names stay attributable in the
audit trail); deactivation removes their rights.  Every change appends an
audit event in the same transaction.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar

import pandas as pd
from sqlalchemy import Engine, func, insert, select, update
from sqlalchemy.orm import Session

from ..db import queries
from ..db.audit import append_event
from ..db.models import User, utcnow
from ..db.session import with_retry
from ..db.uow import UnitOfWork
from ..domain import ROLES
from ..errors import InputError, NotFoundError, PermissionDenied

__all__ = ["add_user", "list_users", "set_role", "deactivate_user", "require_role", "get_user", "run_write", "ROLES"]

T = TypeVar("T")
MAX_NAME = 100


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
    row = session.execute(select(User.id, User.name, User.role, User.active).where(User.name == name)).first()
    return None if row is None else dict(row._mapping)


def require_role(session: Session, name: str | None, roles: tuple[str, ...], action: str) -> dict[str, Any]:
    """The active user ``name`` if their role is one of ``roles``; else :class:`PermissionDenied`."""
    if not name:
        raise PermissionDenied(f"{action} needs a registered user (pass --by NAME)")
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


def add_user(target: Engine | UnitOfWork, name: str, role: str, by: str | None = None, reason: str | None = None) -> dict[str, Any]:
    """Add a user; returns ``{id, name, role, active}``.

    The first user of an empty database must be a ``lead`` and is recorded as
    having added themself; afterwards ``by`` must be an active lead.
    """
    name, role = _clean_name(name), _role(role)

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
        uid = session.execute(insert(User).returning(User.id), [{"name": name, "role": role, "active": True, "created_at": utcnow()}]).scalar_one()
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
