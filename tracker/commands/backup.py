"""``krt backup`` and ``krt restore``.

``krt backup FILE [--force]``
    SQLite: an online copy with SQLite's backup API (safe while the dashboard
    and other ``krt`` processes write), plus ``FILE.manifest.json`` (SHA-256,
    row counts, audit chain head).  PostgreSQL: one line pointing to
    ``pg_dump`` and to the export-based path.
``krt backup --export DIR [--force]``
    Any backend: the exchange format plus users, rule settings and a manifest.
``krt restore FILE [--to URL] [--force] [--by LEAD]``
    Copy a SQLite backup into a new SQLite database (default: the configured
    one, which must then be empty unless ``--force``) and verify it.  A
    backup that would roll the live audit trail back is refused unless a lead
    forces it; the restored database then records a ``restore-rollback``
    event naming the replaced head.
``krt restore --from-export DIR [--to URL] [--by USER]``
    Any backend: import an export-based backup into an empty database.

What each path preserves is listed in :mod:`tracker.services.backup`.
"""

from __future__ import annotations

import argparse
import sys

from ..db.session import database_errors, database_url, mask_url, open_engine
from ..errors import InputError


def register(sub: argparse._SubParsersAction) -> None:
    b = sub.add_parser("backup", help="back up the database (SQLite online copy, or an export-based backup with --export)")
    b.add_argument("file", nargs="?", metavar="FILE", help="backup file to write (SQLite databases)")
    b.add_argument("--export", metavar="DIR", help="write an export-based backup to DIR instead (any backend)")
    b.add_argument("--force", action="store_true", help="replace an existing backup file / write into a non-empty folder")
    b.set_defaults(func=_backup)
    r = sub.add_parser("restore", help="restore a backup into a new database and verify its audit trail")
    r.add_argument("file", nargs="?", metavar="FILE", help="SQLite backup file written by 'krt backup'")
    r.add_argument("--from-export", metavar="DIR", dest="from_export", help="restore an export-based backup (any backend)")
    r.add_argument("--to", metavar="URL", help="database to restore into (default: --database / $KRT_DATABASE_URL)")
    r.add_argument("--force", action="store_true", help="replace a SQLite database that already holds data (stop the dashboard first); "
                   "going behind its audit head also needs the signed-in lead of that database, and is recorded")
    r.add_argument("--by", metavar="USER", default=None, help="who restores (recorded in the new, empty database's audit trail; default: the login name)")
    r.add_argument("--json", action="store_true", help="print the summary as JSON")
    r.set_defaults(func=_restore)


def _backup(args) -> int:
    from ..services.backup import BackupError, PG_DUMP_HINT, backup_export, backup_sqlite

    if bool(args.file) == bool(args.export):
        raise InputError("give either a backup FILE (SQLite) or --export DIR")
    engine = open_engine()
    try:
        with database_errors("backup failed"):
            if args.export:
                m = backup_export(engine, args.export, force=args.force)
            elif engine.dialect.name != "sqlite":
                raise BackupError(PG_DUMP_HINT)
            else:
                from ..db import migrate

                migrate.require_current(engine)
                m = backup_sqlite(engine, args.file, force=args.force)
    finally:
        engine.dispose()
    if args.export:
        print(f"export-based backup of {m['source']} -> {m['dir']}")
        for table, n in m["exported"].items():
            print(f"  {table:<10} {n:>9,} rows")
        print(f"  users {m['users']}, rule settings {m['rule_configs']}; audit head {m['audit_head_id']} {m['audit_head_hash'][:12]}")
        print("  not included: " + ", ".join(m["not_included"]) + " (keep the database itself for those)")
        return 0
    total = sum(m["tables"].values())
    print(f"backup {m['path']} ({m['bytes']:,} bytes, {total:,} rows, schema {m['revision']})")
    print(f"  audit head {m['audit_head_id']} {m['audit_head_hash'][:12]}; manifest {m['manifest']}")
    if not m["audit_ok"]:
        print(f"krt: warning: the database's audit chain does not verify: {m['audit_message']}", file=sys.stderr)
    return 0


def _restore(args) -> int:
    from ..services.backup import restore_from_export, restore_sqlite

    if bool(args.file) == bool(args.from_export):
        raise InputError("give either a backup FILE or --from-export DIR")
    url = args.to or database_url()
    if args.file:
        with database_errors("restore failed"):
            res = restore_sqlite(args.file, url, force=args.force, by=_signed_in_or_none(url, args.by))
        audit = res["audit"]
        if args.json:
            from .grade import print_json

            print_json(res)
        else:
            print(f"restored {args.file} -> {res['target']} ({sum(res['tables'].values()):,} rows, schema {res['revision']})")
            print(f"  audit verify: {'ok' if audit['ok'] else 'FAILED'}: {audit['message']}")
            if res.get("rolled_back"):
                rb = res["rolled_back"]
                print(f"  rolled back: the replaced audit head (event {rb['replaced_head']['events']}, "
                      f"{rb['replaced_head']['head_hash'][:12]}) is named by restore event {rb['event']}, forced by {rb['by']}")
            if not res["schema_current"]:
                print("  the backup's schema is older than this version of the tracker: run 'krt db upgrade' on it")
            for p in res["problems"]:
                print(f"krt: error: {p}", file=sys.stderr)
        return 0 if res["ok"] else 1
    import getpass

    engine = open_engine(url)
    try:
        with database_errors("restore failed"):
            res = restore_from_export(args.from_export, engine, actor=args.by or getpass.getuser())
    finally:
        engine.dispose()
    audit = res["audit"]
    if args.json:
        from .grade import print_json

        print_json({k: v for k, v in res.items() if k != "import"})
    else:
        print(f"restored {args.from_export} -> {mask_url(url)}: {sum(res['tables'].values()):,} rows, "
              f"{res['users']} user(s), {res['rule_configs']} rule setting(s)")
        print(f"  audit verify: {'ok' if audit['ok'] else 'FAILED'}: {audit['message']}")
        print("  the new audit trail starts with this restore; decisions, stage history, raw time courses and the old "
              "trail stay in the original database")
    return 0 if audit["ok"] else 1


def _signed_in_or_none(url: str, by: str | None) -> str | None:
    """The user signed in to the database at ``url`` (``krt login``), or None: only a roll-back needs a signed-in lead."""
    from ..db.session import make_engine
    from ..errors import PermissionDenied
    from .signin import signed_in_user

    engine = make_engine(url)
    try:
        return signed_in_user(engine, by)
    except PermissionDenied:
        return None
    finally:
        engine.dispose()
