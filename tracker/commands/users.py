"""``krt user``: add, list, change role of and deactivate users (roles: lead, scientist, viewer).

The first user of an empty database must be a lead; afterwards only a lead
(``--by``, default ``$KRT_USER``) may change users.  Every change is audited.
"""

from __future__ import annotations

import argparse

from ..domain import ROLES
from .grade import database, default_user, print_json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("user", help="add, list or change users (lead, scientist, viewer)")
    us = p.add_subparsers(dest="user_command", metavar="ACTION", parser_class=type(p))
    add = us.add_parser("add", help="add a user (the first user must be a lead)")
    add.add_argument("name", metavar="NAME")
    add.add_argument("--role", required=True, choices=ROLES)
    add.add_argument("--by", metavar="LEAD", default=None, help="the lead adding the user (default $KRT_USER; not needed for the first user)")
    add.add_argument("--reason", metavar="TEXT")
    add.set_defaults(func=_add)
    ls = us.add_parser("list", help="list users")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=_list)
    role = us.add_parser("role", help="change a user's role (leads only)")
    role.add_argument("name", metavar="NAME")
    role.add_argument("--role", required=True, choices=ROLES)
    role.add_argument("--by", metavar="LEAD", default=None)
    role.add_argument("--reason", metavar="TEXT")
    role.set_defaults(func=_role)
    de = us.add_parser("deactivate", help="deactivate a user (leads only; the name stays in the records)")
    de.add_argument("name", metavar="NAME")
    de.add_argument("--by", metavar="LEAD", default=None)
    de.add_argument("--reason", metavar="TEXT")
    de.set_defaults(func=_deactivate)
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


def _add(args) -> int:
    from ..services.users import add_user

    with database() as engine:
        user = add_user(engine, args.name, args.role, by=args.by or default_user(), reason=args.reason)
    print(f"user {user['name']} added as {user['role']}")
    return 0


def _list(args) -> int:
    from ..services.users import list_users

    with database() as engine:
        df = list_users(engine)
    rows = [{"name": r["name"], "role": r["role"], "active": bool(r["active"]), "created_at": r["created_at"].isoformat()}
            for r in df.to_dict("records")]
    if args.json:
        print_json(rows)
        return 0
    if not rows:
        print("no users yet: add a lead first, e.g. 'krt user add NAME --role lead'")
        return 0
    w = max(4, *(len(r["name"]) for r in rows))
    print(f"{'name':<{w}}  {'role':<9}  active")
    for r in rows:
        print(f"{r['name']:<{w}}  {r['role']:<9}  {'yes' if r['active'] else 'no'}")
    return 0


def _role(args) -> int:
    from ..services.users import set_role

    with database() as engine:
        user = set_role(engine, args.name, args.role, by=args.by or default_user(), reason=args.reason)
    print(f"user {user['name']} is now {user['role']}")
    return 0


def _deactivate(args) -> int:
    from ..services.users import deactivate_user

    with database() as engine:
        user = deactivate_user(engine, args.name, by=args.by or default_user(), reason=args.reason)
    print(f"user {user['name']} deactivated")
    return 0
