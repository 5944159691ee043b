"""``krt db``: schema migrations (upgrade, downgrade, current, check)."""

from __future__ import annotations

import argparse

from ..db import migrate
from ..db.session import database_errors, mask_url, open_engine
from ..errors import KrtError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("db", help="create or migrate the database schema")
    dbsub = p.add_subparsers(dest="db_command", metavar="ACTION", parser_class=type(p))
    up = dbsub.add_parser("upgrade", help="migrate the schema to the newest revision (creates the tables)")
    up.add_argument("revision", nargs="?", default="head", help="target revision (default: head)")
    up.set_defaults(func=_upgrade)
    down = dbsub.add_parser("downgrade", help="migrate the schema back to REV ('base' drops every table); "
                            "a database with data needs a lead's --confirm-data-loss and is backed up first")
    down.add_argument("revision", metavar="REV")
    down.add_argument("--confirm-data-loss", action="store_true", dest="confirm",
                      help="a lead confirms downgrading a database that holds data (a backup is taken first)")
    down.add_argument("--by", metavar="USER", help="must match the signed-in lead who confirms (krt login)")
    down.add_argument("--backup", metavar="PATH", help="where the backup goes (default: beside the SQLite file / the data folder)")
    down.set_defaults(func=_downgrade)
    cur = dbsub.add_parser("current", help="print the schema revision of the database")
    cur.set_defaults(func=_current)
    chk = dbsub.add_parser("check", help="check that the tables match the models (no migration missing)")
    chk.set_defaults(func=_check)
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


def _run(args, fn):
    engine = open_engine()
    try:
        with database_errors(f"krt db {args.db_command} failed"):
            return fn(engine)
    finally:
        engine.dispose()


def _upgrade(args) -> int:
    def go(engine):
        before = migrate.current(engine)
        after = migrate.upgrade(engine, args.revision)
        if before == after:
            print(f"schema already at {after} ({mask_url(str(engine.url))})")
        else:
            print(f"schema upgraded {before or 'empty'} -> {after} ({mask_url(str(engine.url))})")
        return 0

    return _run(args, go)


def _downgrade(args) -> int:
    def go(engine):
        from ..services.admin import downgrade
        from ..errors import PermissionDenied
        from .signin import signed_in_user

        try:
            by = signed_in_user(engine, args.by) if args.confirm else None
        except PermissionDenied:
            by = None  # the service refuses a database with data without a signed-in lead
        res = downgrade(engine, args.revision, by=by, confirm=args.confirm, backup_to=args.backup)
        if res["backup"]:
            print(f"backup of the data -> {res['backup']} (confirmed by {res['actor']})")
        print(f"schema downgraded {res['from'] or 'empty'} -> {res['to'] or 'empty'}")
        return 0

    return _run(args, go)


def _current(args) -> int:
    def go(engine):
        rev, head = migrate.current(engine), migrate.head()
        state = "up to date" if rev == head else f"newest is {head}; run 'krt db upgrade'"
        print(f"{rev or 'empty'} ({state})")
        return 0

    return _run(args, go)


def _check(args) -> int:
    def go(engine):
        migrate.require_current(engine)
        diffs = migrate.check_models_match(engine)
        if diffs:
            raise KrtError(f"the tables differ from the models in {len(diffs)} place(s), first: {diffs[0]!r}")
        print("tables match the models")
        return 0

    return _run(args, go)
