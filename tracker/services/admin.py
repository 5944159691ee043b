"""Safe administration: schema downgrades and restores that could lose or roll back records.

* :func:`downgrade` - ``krt db downgrade REV``.  On a database that holds no
  rows it simply migrates.  On one that holds data it refuses unless an
  active **lead** confirms (``--confirm-data-loss``); then it first takes a
  backup (SQLite: an online copy with manifest; PostgreSQL: an export-based
  backup, and the advice to keep a ``pg_dump``), records a ``downgrade`` audit
  event naming the backup and the chain head, and only then migrates.
* :func:`check_restore` - used by ``krt restore``: a backup whose audit chain
  does not contain the live database's head would roll history back.  That is
  refused unless an active lead of the live database forces it; the restore
  then appends a ``restore-rollback`` event to the restored database naming
  the replaced head, so the roll-back is on the record (and ``krt audit
  verify --expect-head`` with the old head fails, as it should).

Roles are checked here, below the CLI (:func:`tracker.services.users.require_role`).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, inspect

from ..db import migrate
from ..db.audit import append_event, chain_head, find_head
from ..db.session import mask_url
from ..db.uow import UnitOfWork
from ..errors import InputError, PermissionDenied
from .users import require_role

__all__ = ["downgrade", "live_head", "require_lead", "record_rollback", "default_backup_path"]


def _stamp() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")


def default_backup_path(engine: Engine) -> Path:
    """Where a pre-downgrade backup goes: beside a SQLite file, else a folder in the user data folder."""
    from .backup import _sqlite_path

    db = _sqlite_path(engine)
    if db is not None:
        return db.with_name(f"{db.stem}.before-downgrade-{_stamp()}.sqlite")
    from ..db.session import default_sqlite_path

    return default_sqlite_path().parent / f"before-downgrade-{_stamp()}"


def require_lead(engine: Engine, by: str | None, action: str) -> str:
    """The name of ``by`` if they are an active lead of the database of ``engine``; else :class:`PermissionDenied`."""
    with UnitOfWork(engine, write=False) as uow:
        if "users" not in set(inspect(uow.session.connection()).get_table_names()):
            raise PermissionDenied(f"{action} needs a lead of this database, and it has no users table")
        return str(require_role(uow.session, by, ("lead",), action)["name"])


def downgrade(engine: Engine, revision: str, *, by: str | None = None, confirm: bool = False,
              backup_to: str | Path | None = None) -> dict[str, Any]:
    """Migrate the schema back to ``revision`` (see the module docstring).  Returns what was done."""
    from .backup import backup_export, backup_sqlite, is_empty

    before = migrate.current(engine)
    if before is None or is_empty(engine):
        return {"from": before, "to": migrate.downgrade(engine, revision), "backup": None, "actor": None}
    if not confirm:
        raise PermissionDenied(
            f"the database {mask_url(str(engine.url))} holds data and 'db downgrade {revision}' can drop tables with it: "
            "a lead must confirm with --confirm-data-loss (a backup is taken first)")
    actor = require_lead(engine, by, "downgrading a database that holds data")
    target = Path(backup_to).expanduser() if backup_to else default_backup_path(engine)
    if target.exists():
        raise InputError("exists already; give a new path for the pre-downgrade backup (--backup PATH)", file=str(target))
    # the confirmation goes on the record first, so the backup holds it even when the downgrade drops the trail
    with UnitOfWork(engine) as uow:
        head_id, head_hash = chain_head(uow.session)
        append_event(uow.session, actor, "downgrade", "database", None, {"revision": before},
                     {"revision": revision, "backup": str(target), "head_before": {"events": head_id, "head_hash": head_hash}},
                     f"schema downgrade {before} -> {revision} confirmed by a lead; backup to {target}")
        uow.commit()
    if engine.dialect.name == "sqlite":
        where = backup_sqlite(engine, target)["path"]
    else:
        where = backup_export(engine, target)["dir"]
    after = migrate.downgrade(engine, revision)
    return {"from": before, "to": after, "backup": str(where), "actor": actor, "backup_kind": engine.dialect.name}


def live_head(engine: Engine) -> tuple[int, str] | None:
    """The audit head of a database, or ``None`` when it has no audit table."""
    with UnitOfWork(engine, write=False) as uow:
        if "audit_events" not in set(inspect(uow.session.connection()).get_table_names()):
            return None
        return chain_head(uow.session)


def contains_head(engine: Engine, head_hash: str) -> bool:
    with UnitOfWork(engine, write=False) as uow:
        return find_head(uow.session, head_hash) is not None


def record_rollback(engine: Engine, actor: str, source: str, replaced: tuple[int, str], restored: tuple[int, str]) -> dict[str, Any]:
    """Append the ``restore-rollback`` event to the restored database: which head it replaced, and from what."""
    with UnitOfWork(engine) as uow:
        event = append_event(
            uow.session, actor, "restore-rollback", "database", None,
            {"events": replaced[0], "head_hash": replaced[1]},
            {"events": restored[0], "head_hash": restored[1], "from": source, "events_rolled_back": max(0, replaced[0] - restored[0])},
            f"restore from {source} replaced the audit head {replaced[1][:12]} (event {replaced[0]}) with the backup's "
            f"(event {restored[0]}), forced by a lead")
        uow.commit()
    return event
