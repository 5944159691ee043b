"""``krt info``: where the database is, its schema revision and how many rows each table holds."""

from __future__ import annotations

import argparse
import json

from ..db import migrate
from ..db.session import database_errors, mask_url, open_engine


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("info", help="database location, schema revision and row counts")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_info)


def gather_info(engine) -> dict:
    from ..db import queries  # pandas: loaded when the command runs, not when the parser is built

    rev, head = migrate.current(engine), migrate.head()
    info = {
        "database": mask_url(str(engine.url.render_as_string(hide_password=False))),
        "backend": engine.dialect.name,
        "schema_revision": rev,
        "schema_head": head,
        "schema_up_to_date": rev == head,
        "counts": queries.counts(engine) if rev == head else None,
    }
    return info


def _info(args) -> int:
    engine = open_engine()
    try:
        with database_errors("cannot read the database"):
            info = gather_info(engine)
    finally:
        engine.dispose()
    if args.json:
        print(json.dumps(info, indent=2))
        return 0
    print(f"database  {info['database']}")
    state = "up to date" if info["schema_up_to_date"] else f"newest is {info['schema_head']}; run 'krt db upgrade'"
    print(f"schema    {info['schema_revision'] or 'empty'} ({state})")
    if info["counts"] is not None:
        width = max(len(k) for k in info["counts"])
        for table, n in info["counts"].items():
            print(f"  {table:<{width}}  {n:>9,}")
    return 0
