"""``krt gate COMPOUND --to STAGE --by USER --reason TEXT [--waive RULE[:REASON]]... [--json]``

Refused (one line, non-zero exit, and recorded as a refused decision) when the
user is not a lead, a high finding is not waived, or the move skips a stage
without ``--waive stage-skip``.  A waiver without its own reason takes
``--reason``.
"""

from __future__ import annotations

import argparse

from ..rules.config import WAIVABLE
from .grade import database, print_json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("gate", help="move a compound to another stage, gated on its grade (leads only; recorded)")
    p.add_argument("compound", metavar="COMPOUND")
    p.add_argument("--to", required=True, metavar="STAGE", dest="to_stage")
    p.add_argument("--by", required=True, metavar="USER", help="the deciding lead")
    p.add_argument("--reason", required=True, metavar="TEXT")
    p.add_argument("--waive", action="append", default=[], metavar="RULE[:REASON]",
                   help=f"waive a high finding or a skipped stage: one of {', '.join(WAIVABLE)}")
    p.add_argument("--json", action="store_true", help="print the recorded decision as JSON")
    p.set_defaults(func=_gate)


def _gate(args) -> int:
    from ..services.gates import request_gate

    with database() as engine:
        d = request_gate(engine, args.compound, args.to_stage, by=args.by, reason=args.reason, waivers=args.waive)
    if args.json:
        print_json(d)
        return 0
    print(f"approved: {d['compound']} {d['from_stage']} -> {d['to_stage']} by {d['by']} (decision {d['decision_id']}, "
          f"grade {d['grade']}, rules {d['ruleset_version']})")
    for rule, w in d["waivers"].items():
        print(f"  waived {rule}: {w['reason']}" + ("" if w["used"] else " (not needed)"))
    return 0
