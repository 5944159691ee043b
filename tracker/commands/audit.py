"""``krt audit verify`` and ``krt audit show [--compound C] [--json] [--limit N]``.

``verify [--expect-head HASH]`` re-computes the SHA-256 chain, checks the
keyed checkpoints (when an audit key is configured) and every record that
drives a decision against the events that wrote it; exit 0 when intact, 1
naming the first problem otherwise.  ``head [--json]`` prints the head to keep
outside the database; ``keygen FILE`` writes a checkpoint key.  The trail is modelled on 21 CFR Part 11
§11.10(e) and ALCOA+ (no compliance is claimed; that is a matter of validated use).
"""

from __future__ import annotations

import argparse
import sys

from .grade import database, print_json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("audit", help="verify or show the tamper-evident audit trail")
    a = p.add_subparsers(dest="audit_command", metavar="ACTION", parser_class=type(p))
    v = a.add_parser("verify", help="check the hash chain, its keyed checkpoints and the data it fixes; exit 0 when intact, 1 naming the first problem")
    v.add_argument("--expect-head", metavar="HASH", dest="expect_head",
                   help="a head hash kept elsewhere ('krt audit head'); fail when it is no longer in the chain")
    v.add_argument("--json", action="store_true")
    v.set_defaults(func=_verify)
    h = a.add_parser("head", help="print the chain's head (hash and event count) to keep outside the database")
    h.add_argument("--json", action="store_true")
    h.set_defaults(func=_head)
    k = a.add_parser("keygen", help="write a new random audit checkpoint key to FILE (mode 600; never overwrites)")
    k.add_argument("file", metavar="FILE")
    k.set_defaults(func=_keygen)
    s = a.add_parser("show", help="list audit events")
    s.add_argument("--compound", metavar="C", help="only events about this compound, its decisions and measurements")
    s.add_argument("--limit", type=int, metavar="N", help="newest N events")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=_show)
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


def _verify(args) -> int:
    from ..services.auditlog import verify

    with database() as engine:
        res = verify(engine, expect_head=args.expect_head)
    if args.json:
        print_json(res)
    elif res["ok"]:
        print(res["message"])
    else:
        where = f" at event {res['first_broken_id']}" if res["first_broken_id"] is not None else ""
        print(f"krt: audit verify FAILED{where}: {res['message']}", file=sys.stderr)
    return 0 if res["ok"] else 1


def _head(args) -> int:
    from ..services.auditlog import head

    with database() as engine:
        res = head(engine)
    if args.json:
        print_json(res)
    else:
        print(f"{res['head_hash']}  {res['events']} event(s)" + (f", last at {res['at']}" if res["at"] else ""))
    return 0


def _keygen(args) -> int:
    from ..db.anchor import ENV_KEY_FILE, write_key_file

    path = write_key_file(args.file)
    print(f"wrote a new audit key to {path} (mode 600); set {ENV_KEY_FILE}={path} for every process that writes or verifies")
    return 0


def _show(args) -> int:
    from ..services.auditlog import events_as_records, show

    with database() as engine:
        df = show(engine, compound=args.compound, limit=args.limit, newest_first=args.limit is not None)
    if args.limit is not None:
        df = df.iloc[::-1].reset_index(drop=True)
    records = events_as_records(df)
    if args.json:
        print_json(records)
        return 0
    if not records:
        print("no audit events")
        return 0
    for r in records:
        what = f"{r['entity_type']} {r['entity_id']}" if r["entity_id"] is not None else r["entity_type"]
        line = f"{r['id']:>6}  {r['at'][:19]}Z  {r['actor']:<14} {r['action']:<14} {what}"
        if r["reason"]:
            line += f"  \"{r['reason']}\""
        print(line)
    return 0
