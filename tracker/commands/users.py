"""``krt user``: add, list, change role of, deactivate users and set passwords (roles: lead, scientist, viewer).

``krt user add NAME --role ROLE --password-stdin`` sets the new user's initial
password from stdin (without ``--password-stdin`` it is prompted twice, without
echo).  The first user of an empty database becomes the bootstrap lead; after
that only a signed-in lead (``krt login``) may change users.  Every change is
audited (passwords only as "changed", never their hash).
"""

from __future__ import annotations

import argparse

from ..domain import ROLES
from ..errors import InputError
from .grade import database, print_json
from .signin import read_passwords, signed_in_user


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("user", help="add, list or change users (lead, scientist, viewer)")
    us = p.add_subparsers(dest="user_command", metavar="ACTION", parser_class=type(p))
    add = us.add_parser("add", help="add a user with an initial password (the first user must be a lead)")
    add.add_argument("name", metavar="NAME")
    add.add_argument("--role", required=True, choices=ROLES)
    add.add_argument("--password-stdin", action="store_true", help="read the new user's initial password from stdin")
    add.add_argument("--full-name", metavar="TEXT", help="printed name on the user's signatures (default: NAME)")
    add.add_argument("--by", metavar="LEAD", default=None, help="must match the signed-in lead (not needed for the first user)")
    add.add_argument("--reason", metavar="TEXT")
    add.set_defaults(func=_add)
    ls = us.add_parser("list", help="list users")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=_list)
    role = us.add_parser("role", help="change a user's role (leads only)")
    role.add_argument("name", metavar="NAME")
    role.add_argument("--role", required=True, choices=ROLES)
    role.add_argument("--by", metavar="LEAD", default=None, help="must match the signed-in lead")
    role.add_argument("--reason", metavar="TEXT")
    role.set_defaults(func=_role)
    de = us.add_parser("deactivate", help="deactivate a user (leads only; the name stays in the records)")
    de.add_argument("name", metavar="NAME")
    de.add_argument("--by", metavar="LEAD", default=None, help="must match the signed-in lead")
    de.add_argument("--reason", metavar="TEXT")
    de.set_defaults(func=_deactivate)
    pw = us.add_parser("password", help="set a password (your own, or any user's as a lead)")
    pw.add_argument("name", metavar="NAME")
    pw.add_argument("--password-stdin", action="store_true", help="read the new password from stdin")
    pw.add_argument("--reason", metavar="TEXT")
    pw.set_defaults(func=_password)
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


def _new_password(args) -> str:
    if args.password_stdin:
        return read_passwords(True, [f"new password for {args.name}: "])[0]
    first, again = read_passwords(False, [f"New password for {args.name}: ", "Repeat it: "])
    if first != again:
        raise InputError("the two passwords differ; nothing was changed")
    return first


def _add(args) -> int:
    from ..services.users import add_user, user_count

    password = _new_password(args)
    with database() as engine:
        n_users, _ = user_count(engine)
        by = signed_in_user(engine, args.by) if n_users else None
        user = add_user(engine, args.name, args.role, by=by, reason=args.reason, password=password, full_name=args.full_name)
    print(f"user {user['name']} added as {user['role']}" + ("" if n_users else " (first user: the bootstrap lead)"))
    return 0


def _password(args) -> int:
    from ..services.users import set_password, user_count

    password = _new_password(args)
    with database() as engine:
        _, with_pw = user_count(engine)
        by = signed_in_user(engine) if with_pw else None
        user = set_password(engine, args.name, password, by=by, reason=args.reason)
    print(f"password of {user['name']} set")
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
        print("no users yet: add a lead first, e.g. 'krt user add NAME --role lead --password-stdin'")
        return 0
    w = max(4, *(len(r["name"]) for r in rows))
    print(f"{'name':<{w}}  {'role':<9}  active")
    for r in rows:
        print(f"{r['name']:<{w}}  {r['role']:<9}  {'yes' if r['active'] else 'no'}")
    return 0


def _role(args) -> int:
    from ..services.users import set_role

    with database() as engine:
        user = set_role(engine, args.name, args.role, by=signed_in_user(engine, args.by), reason=args.reason)
    print(f"user {user['name']} is now {user['role']}")
    return 0


def _deactivate(args) -> int:
    from ..services.users import deactivate_user

    with database() as engine:
        user = deactivate_user(engine, args.name, by=signed_in_user(engine, args.by), reason=args.reason)
    print(f"user {user['name']} deactivated")
    return 0
