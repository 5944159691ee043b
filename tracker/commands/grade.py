"""``krt grade`` (grade every compound) and ``krt rules`` (show or change rule settings).

``krt grade [--program P] [--compound C] [--json] [--summary]``
    The JSON contract (``--json``): a list with one entry per compound,
    ``{compound, program, series, stage, grade, findings: [{rule, severity,
    message, prompt, caution?, ...numbers}]}``; ``grade`` is the worst
    finding's severity (high|moderate|low) or ``clear`` without findings.
``krt rules show [--program P] [--json]``
``krt rules set [--program P] KEY=VALUE... [--unset KEY]... [--by LEAD] --reason TEXT``
    A signed-in lead's per-program (or, without --program, global) override,
    stored as a new version and audited.
"""

from __future__ import annotations

import argparse
import json
import sys
from contextlib import contextmanager

from ..db import migrate
from ..db.session import open_engine
from ..errors import InputError

from ..fmt import GRADE_LABELS as GRADE_LABEL  # the same words the dashboard shows


@contextmanager
def database():
    """An engine on the configured database, schema checked, disposed afterwards."""
    engine = open_engine()
    try:
        migrate.require_current(engine)
        yield engine
    finally:
        engine.dispose()


def print_json(obj) -> None:
    json.dump(obj, sys.stdout, indent=2, ensure_ascii=False, allow_nan=False)
    sys.stdout.write("\n")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("grade", help="grade every compound's kinetic risk (findings with numbers, prompts and cautions)")
    p.add_argument("--program", metavar="P", help="only this program")
    p.add_argument("--compound", metavar="C", help="only this compound (graded with its program as context)")
    p.add_argument("--json", action="store_true", help="print the JSON list (one entry per compound)")
    p.add_argument("--summary", action="store_true", help="print the grade table only, without the findings")
    p.set_defaults(func=_grade)

    r = sub.add_parser("rules", help="show or change the rule settings (thresholds) of a program")
    rsub = r.add_subparsers(dest="rules_command", metavar="ACTION", parser_class=type(r))
    show = rsub.add_parser("show", help="effective settings, their source (default/global/program) and the rule-set version")
    show.add_argument("--program", metavar="P")
    show.add_argument("--json", action="store_true")
    show.set_defaults(func=_rules_show)
    st = rsub.add_parser("set", help="override settings for a program (leads only; audited)")
    st.add_argument("settings", nargs="*", metavar="KEY=VALUE", help="e.g. ki_shift_threshold=8")
    st.add_argument("--program", metavar="P", help="program to override (default: every program)")
    st.add_argument("--unset", action="append", default=[], metavar="KEY", help="remove an override (back to the layer below)")
    st.add_argument("--by", metavar="USER", default=None, help="must match the signed-in lead (krt login)")
    st.add_argument("--reason", metavar="TEXT", required=True)
    st.set_defaults(func=_rules_set)
    r.set_defaults(func=lambda args: (r.print_help(), 2)[1])


def _grade(args) -> int:
    from ..services.grading import grade_portfolio

    with database() as engine:
        records = grade_portfolio(engine, program=args.program)
    if args.compound:
        records = [r for r in records if r["compound"] == args.compound]
        if not records:
            raise InputError(f"no compound named {args.compound!r}" + (f" in program {args.program!r}" if args.program else ""))
    if args.json:
        print_json(records)
        return 0
    print_report(records, details=not args.summary)
    return 0


def print_report(records: list[dict], details: bool = True) -> None:
    if not records:
        print("no compounds")
        return
    wc = max(8, *(len(r["compound"]) for r in records))
    wp = max(7, *(len(r["program"]) for r in records))
    print(f"{'compound':<{wc}}  {'program':<{wp}}  {'stage':<17}  {'grade':<13}  findings")
    for r in records:
        rules = ", ".join(dict.fromkeys(f["rule"] for f in r["findings"]))
        print(f"{r['compound']:<{wc}}  {r['program']:<{wp}}  {r['stage']:<17}  {GRADE_LABEL[r['grade']]:<13}  {len(r['findings'])}"
              + (f"  ({rules})" if rules else ""))
    counts = {g: sum(1 for r in records if r["grade"] == g) for g in GRADE_LABEL}
    print(f"\n{len(records)} compound(s): " + ", ".join(f"{n} {GRADE_LABEL[g].lower()}" for g, n in counts.items()))
    if not details:
        return
    cautions: list[str] = []
    for r in records:
        if not r["findings"]:
            continue
        print(f"\n{r['compound']} ({r['program']}, {r['stage']}): grade {GRADE_LABEL[r['grade']]}")
        for f in r["findings"]:
            print(f"  [{f['severity']}] {f['rule']}: {f['message']}")
            print(f"      -> {f['prompt']}")
            if f.get("caution") and f["caution"] not in cautions:
                cautions.append(f["caution"])
    if cautions:
        print("\nCaution:")
        for c in cautions:
            print(f"  - {c}")


def _rules_show(args) -> int:
    from ..services.grading import rule_settings

    with database() as engine:
        info = rule_settings(engine, args.program)
    if args.json:
        print_json(info)
        return 0
    print(f"rule set {info['version']}" + (f" for program {info['program']}" if info["program"] else " (global layer)"))
    for k, v in info["settings"].items():
        src = info["source"][k]
        note = "" if src == "default" else f"   ({src} override; default {info['defaults'][k]:g})"
        print(f"  {k:<32} {v:g}{note}")
    return 0


def _parse_settings(items: list[str]) -> dict[str, str]:
    out = {}
    for item in items:
        if "=" not in item:
            raise InputError(f"setting {item!r} must look like KEY=VALUE, e.g. ki_shift_threshold=8")
        k, v = item.split("=", 1)
        out[k.strip()] = v.strip()
    return out


def _rules_set(args) -> int:
    from ..services.grading import set_rule_override

    with database() as engine:
        from .signin import signed_in_user

        info = set_rule_override(engine, args.program, _parse_settings(args.settings), by=signed_in_user(engine, args.by),
                                 reason=args.reason, unset=args.unset)
    print(f"rule settings stored: {info['version']}")
    return 0
