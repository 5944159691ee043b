"""Backup and restore: ``krt backup`` / ``krt restore``.

Two paths, with different promises:

**SQLite file backup** (:func:`backup_sqlite`, :func:`restore_sqlite`).  The
copy is made with SQLite's online backup API (``sqlite3.Connection.backup`` on
the engine's own DBAPI connection), in one step, so it is one consistent
snapshot even while the dashboard or another ``krt`` process keeps writing (in
WAL mode readers and writers do not block each other).  The copy is written
to a temporary file, checked (``PRAGMA integrity_check``, audit chain), turned
into a single self-contained file (``journal_mode=DELETE``) and only then
renamed into place.  A manifest ``FILE.manifest.json`` beside it records the
file's SHA-256, the row count of every table and the audit chain's head (the
anchor :mod:`tracker.db.audit` asks to keep elsewhere: it shows events cut off
the end).  Restoring copies the backup, again with the backup API, into a new
(or, with ``force``, an existing) SQLite database, checks the copy against the
manifest and verifies its audit chain.  **Everything** is preserved: the audit
trail, decisions, stage history, raw time courses and saved fits, users, rule
settings, ids and timestamps.

**Export-based backup** (:func:`backup_export`, :func:`restore_from_export`),
for any backend, PostgreSQL included.  It writes the open exchange format
(``krt export``: programs, compounds, potency, kinetics, PK) plus
``users.json``, ``rule_configs.json`` and ``manifest.json``; restoring imports
it into an *empty* database in one transaction, then adds the users and rule
settings.  Preserved: every program, compound (at its current stage) and
measurement with the text it arrived with (so exporting the restored database
gives identical files), users with their roles and active flags, every
stored version of the rule settings.  **Not** preserved: the audit trail
(the new database's trail starts with the restore's own events, which name
the old chain head so the two can be tied together), gate decisions and
waivers, stage history before the restore, raw time courses and the fit
details of saved fits (their kon/koff values are kept as numbers), record ids
and creation timestamps.  Keep the old database (``pg_dump`` or a SQLite
backup) as the archival record; the export path moves data, it does not
archive history.

For PostgreSQL itself use ``pg_dump`` (see the README); ``krt backup FILE``
on a PostgreSQL URL says so in one line.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import sqlite3
import uuid
from pathlib import Path
from typing import Any

from sqlalchemy import URL, Engine, create_engine, insert, inspect, select, text
from sqlalchemy.orm import Session

from .. import __version__ as _tracker_version
from ..db import migrate
from ..db.audit import append_events, chain_head, verify_chain
from ..db.models import Program, RuleConfig, TABLES_IN_ORDER, User, utcnow
from ..db.session import make_engine, mask_url
from ..db.uow import UnitOfWork
from ..domain import ROLES
from ..errors import InputError, KrtError, PermissionDenied

__all__ = [
    "backup_sqlite",
    "restore_sqlite",
    "backup_export",
    "restore_from_export",
    "manifest_path",
    "is_empty",
    "count_rows",
    "PG_DUMP_HINT",
    "BackupError",
]

MANIFEST_SUFFIX = ".manifest.json"
EXPORT_MANIFEST = "manifest.json"
USERS_FILE = "users.json"
RULES_FILE = "rule_configs.json"
FORMAT = "krt-backup-1"

PG_DUMP_HINT = (
    "PostgreSQL is backed up with pg_dump (e.g. pg_dump -Fc -f krt.dump 'postgresql://USER@HOST/DB'; "
    "restore with pg_restore -d NEWDB krt.dump), or portably with 'krt backup --export DIR' "
    "and 'krt restore --from-export DIR' (see the README)"
)


class BackupError(KrtError, RuntimeError):
    """A backup or restore that cannot be done as asked (nothing was changed)."""


# ------------------------------------------------------------------ helpers
def manifest_path(backup_file: str | Path) -> Path:
    """``FILE.manifest.json`` beside a SQLite backup file."""
    p = Path(backup_file)
    return p.with_name(p.name + MANIFEST_SUFFIX)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")


def _sqlite_path(engine_or_url: Engine | str) -> Path | None:
    """The file of a SQLite engine/URL, ``None`` for another backend; refuses in-memory databases."""
    from sqlalchemy.engine import make_url

    url = engine_or_url.url if isinstance(engine_or_url, Engine) else make_url(engine_or_url)
    if url.get_backend_name() != "sqlite":
        return None
    db = url.database
    if not db or db == ":memory:" or db.startswith("file:"):
        raise BackupError(f"cannot back up or restore an in-memory or URI SQLite database ({mask_url(str(url))})")
    return Path(db).expanduser()


def _counts(conn) -> dict[str, int]:
    """Rows per tracker table (tables missing in an old schema are skipped)."""
    have = set(inspect(conn).get_table_names())
    return {t: int(conn.execute(text(f'SELECT count(*) FROM "{t}"')).scalar_one()) for t in TABLES_IN_ORDER if t in have}


def _revision(conn) -> str | None:
    if "alembic_version" not in set(inspect(conn).get_table_names()):
        return None
    return conn.execute(text("SELECT version_num FROM alembic_version")).scalar()


def is_empty(engine: Engine) -> bool:
    """True when no tracker table holds a row (a migrated but unused database counts as empty)."""
    with engine.connect() as conn:
        return not any(_counts(conn).values())


def _readonly_uri(path: Path) -> str:
    """A read-only SQLite URI for ``path`` (percent-encoded, so spaces, '?' and '#' in names are safe)."""
    return Path(path).resolve().as_uri() + "?mode=ro"


def _plain_engine(path: Path) -> Engine:
    """An engine on a SQLite file without the app's pragmas (no WAL switch: the file stays one file)."""
    return create_engine(URL.create("sqlite", database=str(path)))


def _inspect_sqlite_copy(path: Path) -> dict[str, Any]:
    """Integrity check, schema revision, counts, audit head and chain check of a SQLite file."""
    con = sqlite3.connect(_readonly_uri(path), uri=True)
    try:
        try:
            check = con.execute("PRAGMA integrity_check").fetchone()[0]
        except sqlite3.DatabaseError as exc:
            raise BackupError(f"{path}: not a SQLite database ({exc})") from None
    finally:
        con.close()
    if check != "ok":
        raise BackupError(f"{path}: SQLite integrity check failed: {check}")
    eng = _plain_engine(path)
    try:
        with eng.connect() as conn:
            tables = set(inspect(conn).get_table_names())
            if "audit_events" not in tables or "alembic_version" not in tables:
                raise BackupError(f"{path}: not a tracker database (no audit_events / alembic_version table)")
            revision = _revision(conn)
            counts = _counts(conn)
        with Session(eng) as session:
            ok, broken, message = verify_chain(session)
            head_id, head_hash = chain_head(session)
    finally:
        eng.dispose()
    return {"revision": revision, "tables": counts, "audit_ok": ok, "audit_message": message,
            "audit_head_id": head_id, "audit_head_hash": head_hash}


# ------------------------------------------------------------------ SQLite backup
def backup_sqlite(engine: Engine, dest: str | Path, *, force: bool = False) -> dict[str, Any]:
    """Copy the SQLite database of ``engine`` to ``dest`` with the online backup API.

    Safe while other connections and processes write: the copy is one
    snapshot.  ``dest`` must not exist unless ``force``.  Writes the manifest
    beside it and returns it, plus ``path`` (the backup) and ``manifest`` (its path).
    """
    src_path = _sqlite_path(engine)
    if src_path is None:
        raise BackupError(PG_DUMP_HINT)
    dest = Path(dest).expanduser()
    if dest.is_dir():
        raise BackupError(f"{dest} is a folder; give the backup file's name (e.g. {dest / 'tracker-backup.sqlite'})")
    if dest.exists() and not force:
        raise BackupError(f"{dest} exists; choose a new file name or pass --force to replace it")
    if dest.resolve() == src_path.resolve():
        raise BackupError("the backup file cannot be the database itself")
    if not src_path.is_file():
        raise BackupError(f"no database file at {src_path}")
    tmp = dest.with_name(f".{dest.name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        dest.parent.mkdir(parents=True, exist_ok=True)
        with engine.connect() as conn:
            source = conn.connection.driver_connection  # the sqlite3.Connection itself, no transaction open
            target = sqlite3.connect(tmp)
            try:
                source.backup(target)  # pages=-1: the whole database in one step = one consistent snapshot
                target.execute("PRAGMA journal_mode=DELETE")  # one self-contained file, no -wal beside it
            finally:
                target.close()
        info = _inspect_sqlite_copy(tmp)
        os.replace(tmp, dest)
    except (OSError, sqlite3.Error) as exc:
        reason = getattr(exc, "strerror", None) or str(exc)
        raise BackupError(f"cannot write the backup to {dest}: {reason} (nothing was written there)") from None
    finally:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
    manifest = {
        "format": FORMAT,
        "kind": "sqlite-file",
        "created_at": _now(),
        "tracker_version": _tracker_version,
        "source": str(src_path),
        "file": dest.name,
        "sha256": _sha256(dest),
        "bytes": dest.stat().st_size,
        **info,
    }
    mpath = manifest_path(dest)
    try:
        mpath.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    except OSError as exc:
        raise BackupError(f"the backup {dest} was written but its manifest could not be ({mpath}: {exc.strerror or exc})") from None
    return manifest | {"path": str(dest), "manifest": str(mpath)}


def _sqlite_target_is_empty(path: Path) -> bool:
    if not path.exists() or path.stat().st_size == 0:
        return True
    eng = _plain_engine(path)
    try:
        with eng.connect() as conn:
            return not any(_counts(conn).values())
    except Exception:  # an unreadable file is not "empty": refuse to overwrite it without --force
        return False
    finally:
        eng.dispose()


def restore_sqlite(backup_file: str | Path, target_url: str, *, force: bool = False, by: str | None = None) -> dict[str, Any]:
    """Copy a SQLite backup into the SQLite database at ``target_url`` and verify it.

    The target must be new or empty unless ``force``.  A backup whose audit
    chain does not hold the target's current head would roll history back:
    that needs ``force`` **and** ``by`` an active lead of the target, and the
    restored database then gets a ``restore-rollback`` event naming the
    replaced head (:mod:`tracker.services.admin`).  The backup is checked
    first (integrity, against its manifest when present); the copy's audit
    chain is verified afterwards.  Returns a summary.
    """
    backup_file = Path(backup_file).expanduser()
    if not backup_file.is_file():
        raise InputError("no such backup file", file=str(backup_file))
    target = _sqlite_path(target_url)
    if target is None:
        raise BackupError("a SQLite backup file restores into a SQLite database; for PostgreSQL use pg_restore "
                          "or 'krt restore --from-export DIR' (see the README)")
    if target.exists() and target.resolve() == backup_file.resolve():
        raise BackupError("the target database cannot be the backup file itself")
    info = _inspect_sqlite_copy(backup_file)
    mpath = manifest_path(backup_file)
    manifest = None
    if mpath.is_file():
        try:
            manifest = json.loads(mpath.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputError(f"unreadable manifest ({exc})", file=str(mpath)) from None
        if manifest.get("sha256") != _sha256(backup_file):
            raise BackupError(f"{backup_file} does not match its manifest (SHA-256 differs): the file changed after the backup")
    if not force and not _sqlite_target_is_empty(target):
        raise BackupError(f"{target} already holds data; restore into a new file, or pass --force to replace it")
    replaced, actor = _rollback_guard(backup_file, target, info, by)
    target.parent.mkdir(parents=True, exist_ok=True)
    source = sqlite3.connect(_readonly_uri(backup_file), uri=True)
    try:
        dest = sqlite3.connect(target, timeout=30)
        try:
            source.backup(dest)  # replaces the target's pages; handles a target in WAL mode correctly
        finally:
            dest.close()
    finally:
        source.close()
    engine = make_engine(URL.create("sqlite", database=str(target)).render_as_string())
    rollback_event = None
    try:
        from .auditlog import verify

        if replaced is not None:
            from .admin import record_rollback

            rollback_event = record_rollback(engine, actor, str(backup_file), replaced,
                                             (info["audit_head_id"], info["audit_head_hash"]))
        result = verify(engine, expect_head=info["audit_head_hash"] if info["audit_head_id"] else None)
        with engine.connect() as conn:
            counts = _counts(conn)
            revision = _revision(conn)
    finally:
        engine.dispose()
    problems = []
    expected_counts = dict(info["tables"])
    if rollback_event is not None:  # the restore's own event (and its checkpoint) come on top of the backup's trail
        expected_counts["audit_events"] = result["head_id"]
    if manifest is not None:
        if manifest.get("audit_head_hash") != info["audit_head_hash"] or manifest.get("audit_head_id") != info["audit_head_id"]:
            problems.append("audit head differs from the manifest")
        if manifest.get("tables") and {**manifest["tables"], "audit_events": expected_counts.get("audit_events")} != counts:
            problems.append("row counts differ from the manifest")
    if counts != expected_counts:
        problems.append("row counts differ from the backup file")
    return {
        "target": str(target),
        "revision": revision,
        "schema_current": revision == migrate.head(),
        "tables": counts,
        "audit": result,
        "manifest": str(mpath) if manifest is not None else None,
        "problems": problems,
        "ok": result["ok"] and not problems,
        "rolled_back": None if replaced is None else {"replaced_head": {"events": replaced[0], "head_hash": replaced[1]},
                                                       "event": rollback_event["id"] if rollback_event else None, "by": actor},
    }


def _rollback_guard(backup_file: Path, target: Path, info: dict[str, Any], by: str | None) -> tuple[tuple[int, str] | None, str | None]:
    """``(replaced head, lead)`` when restoring would go behind the target's audit head; ``(None, None)`` otherwise.

    Refuses unless ``by`` is an active lead of the target (``--force`` was checked already).
    """
    if not target.exists() or _sqlite_target_is_empty(target):
        return None, None
    from .admin import live_head, require_lead

    eng = _plain_engine(target)
    try:
        live = live_head(eng)
        if live is None or live[0] == 0:
            return None, None
        bk = _plain_engine(backup_file)
        try:
            from .admin import contains_head

            if contains_head(bk, live[1]):
                return None, None  # the backup holds the live head: nothing of the trail is lost
        finally:
            bk.dispose()
        behind = (f"the backup's audit trail ends at event {info['audit_head_id']} and does not contain {target}'s current "
                  f"head (event {live[0]}, {live[1][:12]}): restoring would roll history back")
        try:
            actor = require_lead(eng, by, "a restore that rolls the audit trail back")
        except PermissionDenied as exc:
            raise PermissionDenied(f"{behind}; only a lead may force that ({exc.one_line()}), and the restore then "
                                   "records an event naming the replaced head") from None
        return live, actor
    finally:
        eng.dispose()


# ------------------------------------------------------------------ export-based
def backup_export(engine: Engine, folder: str | Path, *, force: bool = False) -> dict[str, Any]:
    """Export every table (``krt export`` format) plus users, rule settings and a manifest to ``folder``."""
    from .importing import export_all

    folder = Path(folder).expanduser()
    if folder.exists() and not folder.is_dir():
        raise BackupError(f"{folder} is a file; give a folder for the export-based backup")
    if folder.is_dir() and any(folder.iterdir()) and not force:
        raise BackupError(f"{folder} is not empty; choose a new folder or pass --force to write into it")
    migrate.require_current(engine)
    summary = export_all(engine, folder)
    with UnitOfWork(engine, write=False) as uow:
        s = uow.session
        users = [
            {"name": r.name, "role": r.role, "active": bool(r.active), "created_at": r.created_at.isoformat()}
            for r in s.execute(select(User.name, User.role, User.active, User.created_at).order_by(User.id))
        ]
        rules = [
            {"program": r.program, "version": int(r.version), "config_json": r.config_json, "created_by": r.created_by,
             "created_at": r.created_at.isoformat()}
            for r in s.execute(
                select(RuleConfig.version, RuleConfig.config_json, RuleConfig.created_by, RuleConfig.created_at,
                       Program.name.label("program")).outerjoin(Program, Program.id == RuleConfig.program_id).order_by(RuleConfig.id))
        ]
        head_id, head_hash = chain_head(s)
        counts = _counts(s.connection())
        revision = _revision(s.connection())
    (folder / USERS_FILE).write_text(json.dumps(users, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    (folder / RULES_FILE).write_text(json.dumps(rules, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    files = {name: _sha256(Path(t["file"])) for name, t in summary["tables"].items()}
    manifest = {
        "format": FORMAT,
        "kind": "export",
        "created_at": _now(),
        "tracker_version": _tracker_version,
        "source": mask_url(str(engine.url)),
        "revision": revision,
        "tables": counts,
        "audit_head_id": head_id,
        "audit_head_hash": head_hash,
        "files_sha256": files | {USERS_FILE: _sha256(folder / USERS_FILE), RULES_FILE: _sha256(folder / RULES_FILE)},
        "not_included": ["audit_events", "decisions", "stage_history", "time_courses", "fit details of saved fits",
                         "record ids and creation timestamps"],
    }
    (folder / EXPORT_MANIFEST).write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    exported = {name: t["rows"] for name, t in summary["tables"].items()}
    return manifest | {"dir": str(folder), "exported": exported, "users": len(users), "rule_configs": len(rules)}


def _read_json_list(path: Path, what: str) -> list[dict[str, Any]]:
    if not path.is_file():
        return []
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"unreadable {what} file ({exc})", file=str(path)) from None
    if not isinstance(data, list) or not all(isinstance(d, dict) for d in data):
        raise InputError(f"expected a JSON list of {what} records", file=str(path))
    return data


def _check_users(users: list[dict[str, Any]], path: Path) -> list[dict[str, Any]]:
    out, seen = [], set()
    for i, u in enumerate(users, start=1):
        name = " ".join(str(u.get("name") or "").split())
        role = str(u.get("role") or "")
        if not name or role not in ROLES:
            raise InputError(f"user record {i} needs a name and a role ({', '.join(ROLES)})", file=str(path))
        if name in seen:
            raise InputError(f"user {name!r} appears twice", file=str(path))
        seen.add(name)
        out.append({"name": name, "role": role, "active": bool(u.get("active", True))})
    if out and not any(u["role"] == "lead" and u["active"] for u in out):
        raise InputError("no active lead among the users; nobody could decide gates after the restore", file=str(path))
    return out


def restore_from_export(folder: str | Path, engine: Engine, actor: str) -> dict[str, Any]:
    """Import an export-based backup into the empty database of ``engine``, in one transaction.

    The schema is created when the database has none.  Data first (recorded
    as an import by ``actor``), then users and rule settings, each with an
    audit event that names the old chain head from the manifest.  Refuses a
    database that already holds rows: merging is what ``krt import`` is for.
    """
    from .importing import import_path

    folder = Path(folder).expanduser()
    if not folder.is_dir():
        raise InputError("no such folder (give the folder written by 'krt backup --export' or 'krt export')", file=str(folder))
    if not any(p.suffix.lower() == ".csv" for p in folder.iterdir()):
        raise InputError("no exported .csv files in the folder", file=str(folder))
    manifest_file = folder / EXPORT_MANIFEST
    manifest: dict[str, Any] = {}
    if manifest_file.is_file():
        try:
            manifest = json.loads(manifest_file.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputError(f"unreadable manifest ({exc})", file=str(manifest_file)) from None
        for name, digest in (manifest.get("files_sha256") or {}).items():
            f = folder / (name if name.endswith(".json") else f"{name}.csv")
            if not f.is_file() or _sha256(f) != digest:
                raise BackupError(f"{f} does not match the manifest (missing or changed after the backup)")
    users = _check_users(_read_json_list(folder / USERS_FILE, "user"), folder / USERS_FILE)
    rules = _read_json_list(folder / RULES_FILE, "rule setting")
    if migrate.current(engine) is None:
        migrate.upgrade(engine)
    migrate.require_current(engine)
    if not is_empty(engine):
        raise BackupError(f"the target database {mask_url(str(engine.url))} already holds data; "
                          "restore into a new, empty database (use 'krt import' to merge)")
    origin = f"restored from {folder}" + (
        f" (export of {manifest.get('source')} taken {manifest.get('created_at')}, whose audit chain ended at event "
        f"{manifest.get('audit_head_id')} {str(manifest.get('audit_head_hash'))[:12]})" if manifest else "")
    with UnitOfWork(engine) as uow:
        summary = import_path(uow, folder, actor=actor)
        s = uow.session
        events: list[dict[str, Any]] = []
        now = utcnow()
        for u in users:
            uid = s.execute(insert(User).returning(User.id), [u | {"created_at": now}]).scalar_one()
            events.append({"actor": actor, "action": "restore", "entity_type": "user", "entity_id": uid,
                           "before": None, "after": u, "reason": origin})
        program_ids = dict(s.execute(select(Program.name, Program.id)).all())
        for r in rules:
            prog = r.get("program")
            if prog is not None and prog not in program_ids:
                raise InputError(f"rule settings for unknown program {prog!r}", file=str(folder / RULES_FILE))
            row = {"program_id": program_ids.get(prog) if prog is not None else None, "version": int(r["version"]),
                   "config_json": str(r["config_json"]), "created_by": r.get("created_by"), "created_at": now}
            rid = s.execute(insert(RuleConfig).returning(RuleConfig.id), [row]).scalar_one()
            events.append({"actor": actor, "action": "restore", "entity_type": "rule_config", "entity_id": rid,
                           "before": None, "after": {"program": prog, "version": row["version"],
                                                     "settings": json.loads(row["config_json"])}, "reason": origin})
        events.append({"actor": actor, "action": "restore", "entity_type": "database", "entity_id": None, "before": None,
                       "after": {"from": str(folder), "manifest": {k: manifest.get(k) for k in
                                 ("source", "created_at", "revision", "audit_head_id", "audit_head_hash", "tables")} if manifest else None,
                                 "users": len(users), "rule_configs": len(rules)},
                       "reason": origin})
        append_events(s, events)
        uow.commit()
    from .auditlog import verify

    with engine.connect() as conn:
        counts = _counts(conn)
    return {"target": mask_url(str(engine.url)), "import": summary, "users": len(users), "rule_configs": len(rules),
            "tables": counts, "audit": verify(engine), "manifest": manifest or None}


def count_rows(engine: Engine) -> dict[str, int]:
    """Rows per tracker table (for reports and tests)."""
    with engine.connect() as conn:
        return _counts(conn)
