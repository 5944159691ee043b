"""``krt changes --since DATE|PACK [--json]``: everything since a date or since a review pack was built.

JSON keys: ``since``, ``grades`` (``compound, from, to, direction`` up|down|new),
``findings_new`` and ``findings_resolved`` (``compound, rule, severity``),
``measurements`` (``compound, table, rows``), ``decisions``,
``actions_opened`` and ``actions_closed``.  Grades come from the grade
snapshots written after every write that grades (see the README).
"""

from __future__ import annotations

import argparse

from .grade import database, print_json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("changes", help="what changed since a date or a review pack (grades, findings, data, gates, actions)")
    p.add_argument("--since", required=True, metavar="DATE|PACK", help="YYYY-MM-DD, an ISO date-time, or a review pack .html file")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=_changes)


def _changes(args) -> int:
    from ..services.history import changes, changes_markdown_lines, parse_since

    since, label = parse_since(args.since)
    with database() as engine:
        ch = changes(engine, since)
    if args.json:
        print_json(ch)
        return 0
    lines = changes_markdown_lines(ch)
    print(f"since {label}: " + (f"{len(lines)} change(s)" if lines else "nothing changed"))
    for line in lines:
        print(f"  {line}")
    return 0
