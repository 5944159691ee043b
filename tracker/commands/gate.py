"""``krt gate COMPOUND --to STAGE --reason TEXT [--waive RULE[:REASON]]... [--second-lead LEAD] [--password-stdin] [--by USER] [--json]``

The signed-in lead (``krt login``) decides and **signs**: the password is
re-entered now (prompted without echo, or the first line of stdin with
``--password-stdin``).  Where the two-person rule applies (waivers on the
``candidate`` -> ``clinical`` step by default, or a lead waiving their own
refused request), ``--second-lead LEAD`` co-signs with their own password
(the next prompt, or the second line of stdin).

Refused (one line, non-zero exit, and recorded as a refused decision) when the
user is not a lead, a high finding is not waived, a second lead's signature is
missing, or the move skips a stage without ``--waive stage-skip``.  A waiver
without its own reason takes ``--reason``.  A wrong password records nothing.
"""

from __future__ import annotations

import argparse

from ..rules.config import WAIVABLE
from .grade import database, print_json
from .signin import read_passwords, signed_in_user


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("gate", help="move a compound to another stage, gated on its grade (leads only; recorded)")
    p.add_argument("compound", metavar="COMPOUND")
    p.add_argument("--to", required=True, metavar="STAGE", dest="to_stage")
    p.add_argument("--by", metavar="USER", default=None, help="must match the signed-in lead (krt login)")
    p.add_argument("--reason", required=True, metavar="TEXT")
    p.add_argument("--waive", action="append", default=[], metavar="RULE[:REASON]",
                   help=f"waive a high finding or a skipped stage: one of {', '.join(WAIVABLE)}")
    p.add_argument("--second-lead", metavar="LEAD", default=None,
                   help="a second lead co-signs the waivers (two-person rule), with their own password")
    p.add_argument("--password-stdin", action="store_true",
                   help="read the signing password from stdin (and the second lead's from the next line)")
    p.add_argument("--json", action="store_true", help="print the recorded decision as JSON")
    p.set_defaults(func=_gate)


def _gate(args) -> int:
    from ..services.gates import request_gate, signature_text

    with database() as engine:
        by = signed_in_user(engine, args.by)
        prompts = [f"Sign as {by} (password): "] + ([f"Co-sign as {args.second_lead} (password): "] if args.second_lead else [])
        passwords = read_passwords(args.password_stdin, prompts)
        d = request_gate(engine, args.compound, args.to_stage, by=by, reason=args.reason, waivers=args.waive,
                         password=passwords[0], second_lead=args.second_lead,
                         second_password=passwords[1] if args.second_lead else None)
    if args.json:
        print_json(d)
        return 0
    print(f"approved: {d['compound']} {d['from_stage']} -> {d['to_stage']} by {d['by']} (decision {d['decision_id']}, "
          f"grade {d['grade']}, rules {d['ruleset_version']})")
    for rule, w in d["waivers"].items():
        print(f"  waived {rule}: {w['reason']}" + ("" if w["used"] else " (not needed)"))
    for sig in d["signatures"]:
        print(f"  signed: {signature_text(sig)}")
    return 0
