"""``krt action``: a finding's prompt becomes an action with an owner, a due date and a status.

``krt action add COMPOUND --rule RULE --owner USER --due YYYY-MM-DD [--note TEXT]``
``krt action list [--all] [--json]``  keys ``id, compound, rule, owner, due, status, note`` (plus
    ``prompt, overdue, created_by, created_at, closed_by, closed_at``)
``krt action done ID [--note TEXT]`` and ``krt action drop ID --note TEXT``

Who acts is the user signed in with ``krt login`` (``--by`` must match); leads and scientists may
open and close actions.  Every change is audited.  Open actions whose finding
disappears are closed automatically after the next write that grades.
"""

from __future__ import annotations

import argparse

from .grade import database, print_json
from .signin import signed_in_user


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("action", help="open, list and close actions on findings (owner, due date, status)")
    asub = p.add_subparsers(dest="action_command", metavar="ACTION", parser_class=type(p))

    add = asub.add_parser("add", help="turn a compound's finding into an action")
    add.add_argument("compound", metavar="COMPOUND")
    add.add_argument("--rule", required=True, metavar="RULE", help="the finding's rule (see krt grade)")
    add.add_argument("--owner", required=True, metavar="USER")
    add.add_argument("--due", required=True, metavar="YYYY-MM-DD")
    add.add_argument("--note", metavar="TEXT")
    add.add_argument("--by", metavar="USER", default=None, help="must match the signed-in user (krt login)")
    add.add_argument("--json", action="store_true")
    add.set_defaults(func=_add)

    ls = asub.add_parser("list", help="open actions, oldest due first (--all: closed ones too)")
    ls.add_argument("--all", action="store_true", help="include done and dropped actions")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=_list)

    for name, helptext, note_required in (("done", "mark an action done", False), ("drop", "drop an action (say why)", True)):
        c = asub.add_parser(name, help=helptext)
        c.add_argument("id", metavar="ID", type=int)
        c.add_argument("--note", metavar="TEXT", required=note_required)
        c.add_argument("--by", metavar="USER", default=None, help="must match the signed-in user (krt login)")
        c.add_argument("--json", action="store_true")
        c.set_defaults(func=_close, status="done" if name == "done" else "dropped")
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


def _line(a: dict) -> str:
    late = "  OVERDUE" if a.get("overdue") else ""
    note = f"  ({a['note']})" if a.get("note") else ""
    return f"#{a['id']:<4} {a['due']}  {a['status']:<7}  {a['owner']:<16}  {a['compound']}  {a['rule']}{late}{note}"


def _add(args) -> int:
    from ..services.actions import add_action

    with database() as engine:
        a = add_action(engine, args.compound, args.rule, args.owner, args.due, args.note, by=signed_in_user(engine, args.by))
    if args.json:
        print_json(a)
    else:
        print(f"action {a['id']} opened: {a['compound']} {a['rule']} -> {a['owner']} by {a['due']}")
    return 0


def _list(args) -> int:
    from ..services.actions import list_actions

    with database() as engine:
        rows = list_actions(engine, include_closed=args.all)
    if args.json:
        print_json(rows)
        return 0
    if not rows:
        print("no open actions" if not args.all else "no actions")
        return 0
    for a in rows:
        print(_line(a))
    return 0


def _close(args) -> int:
    from ..services.actions import close_action

    with database() as engine:
        a = close_action(engine, args.id, args.status, args.note, by=signed_in_user(engine, args.by))
    if args.json:
        print_json(a)
    else:
        print(f"action {a['id']} {a['status']}: {a['compound']} {a['rule']}")
    return 0
