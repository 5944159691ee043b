"""``krt queue [--program P] [--json] [--limit N]``: compounds ranked by how much a kinetic
measurement would change a decision (stage, grade, uncertainty), each with the assay to use."""

from __future__ import annotations

import argparse

from .grade import database, print_json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("queue", help="rank compounds by the value of a kinetic measurement, with the assay to use")
    p.add_argument("--program", metavar="P", help="only this program")
    p.add_argument("--limit", type=int, metavar="N", help="show the first N entries (default: all with --json, 25 otherwise)")
    p.add_argument("--json", action="store_true", help="print a JSON list")
    p.set_defaults(func=_queue)


def _queue(args) -> int:
    from ..errors import InputError
    from ..services.queue import measurement_queue

    if args.limit is not None and args.limit < 1:
        raise InputError("--limit must be a positive number")
    limit = args.limit if args.limit is not None else (None if args.json else 25)
    with database() as engine:
        entries = measurement_queue(engine, program=args.program, limit=limit)
    if args.json:
        print_json(entries)
        return 0
    if not entries:
        print("queue empty: every compound has a precise residence time")
        return 0
    wc = max(8, *(len(e["compound"]) for e in entries))
    print(f"{'#':>3}  {'compound':<{wc}}  {'stage':<17}  {'grade':<8}  {'score':>5}  suggested assay")
    for e in entries:
        print(f"{e['rank']:>3}  {e['compound']:<{wc}}  {e['stage']:<17}  {e['grade']:<8}  {e['score']:>5.0f}  {e['suggested_assay']}")
        print(f"     {'':<{wc}}  {e['reason']}")
    return 0
