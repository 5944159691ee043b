"""``krt import`` and ``krt export``: the open CSV / XLSX exchange format."""

from __future__ import annotations

import argparse
import sys

from ..db import migrate
from ..db.session import database_errors, open_engine
from ..errors import KrtError
from ..io.specs import SPECS


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("import", help="import a CSV file, an .xlsx workbook or a folder of them (all or nothing)")
    p.add_argument("path", metavar="PATH", help="programs.csv, compounds.csv, potency.csv, kinetics.csv, pk.csv, a folder, or a workbook")
    p.add_argument("--table", choices=list(SPECS), help="table of a file whose name does not say")
    p.add_argument("--by", metavar="USER", default=None, help="must match the signed-in user (krt login); leads and scientists import")
    p.set_defaults(func=_import)
    e = sub.add_parser("export", help="write every table as CSV (and optionally one .xlsx) in the import format")
    e.add_argument("dir", metavar="DIR")
    e.add_argument("--xlsx", metavar="FILE", help="also write a workbook with one sheet per table")
    e.set_defaults(func=_export)


def _import(args) -> int:
    from ..services.importing import import_path

    engine = open_engine()
    try:
        with database_errors("import failed"):
            migrate.require_current(engine)
            from .signin import signed_in_user

            summary = import_path(engine, args.path, table=args.table, actor=signed_in_user(engine, args.by))
    finally:
        engine.dispose()
    for w in summary["warnings"]:
        print(f"krt: warning: {w}", file=sys.stderr)
    for table, s in summary["tables"].items():
        print(f"{table:<10} {s['rows']:>7,} rows: {s['inserted']:,} new, {s['updated']:,} updated, {s['unchanged']:,} already stored")
    print(f"audit: {summary['audit_events']} event(s) appended")
    return 0


def _export(args) -> int:
    from ..services.importing import export_all

    engine = open_engine()
    try:
        with database_errors("export failed"):
            migrate.require_current(engine)
            summary = export_all(engine, args.dir, xlsx=args.xlsx)
    except OSError as exc:
        raise KrtError(f"cannot write the export to {exc.filename or args.dir}: {exc.strerror or exc}") from None
    finally:
        engine.dispose()
    for table, s in summary["tables"].items():
        print(f"{table:<10} {s['rows']:>7,} rows -> {s['file']}")
    if "xlsx" in summary:
        print(f"workbook -> {summary['xlsx']}")
    if "audit_head" in summary:
        h = summary["audit_head"]
        print(f"audit head {h['head_hash']} ({h['events']} event(s)) -> audit_head.json")
    return 0
