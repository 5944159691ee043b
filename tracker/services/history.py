"""Grade history and the follow-up of every write.

Grade history is kept as **snapshots written when grades change**: after each
write that can move a grade (an import, a saved fit, a gate decision, a rule
change, the demo load) :func:`refresh` grades the portfolio once, compares
every compound's grade and findings (rule and severity) with its latest row in
``grade_snapshots`` and appends a row for each compound that changed (the
first refresh writes one for every compound).  In the same transaction it
closes the open actions whose finding has disappeared
(:func:`tracker.services.actions.close_resolved`) and appends one audit event
for the snapshots it wrote.  The history is therefore not reconstructed from
the audit trail; it starts at the first refresh of a database.
"""

from __future__ import annotations

import contextvars
import json
from contextlib import contextmanager
from typing import Any, Iterator

import pandas as pd
from sqlalchemy import Engine, func, insert, select
from sqlalchemy.orm import Session

from ..db.audit import append_event
from ..db.models import GradeSnapshot, utcnow
from ..db.uow import UnitOfWork
from .actions import AUTO_ACTOR, close_resolved
from .users import run_write

__all__ = ["refresh", "deferred", "latest_snapshots", "signature"]

_DEFERRED: contextvars.ContextVar[list | None] = contextvars.ContextVar("krt_deferred_refresh", default=None)


@contextmanager
def deferred(target: Engine, why: str, actor: str | None = None) -> Iterator[None]:
    """Run several writes with one refresh at the end (the demo load: one import and eight fits)."""
    token = _DEFERRED.set([])
    try:
        yield
    finally:
        _DEFERRED.reset(token)
    refresh(target, why, actor)


def signature(findings: pd.DataFrame) -> dict[int, str]:
    """compound_id -> canonical JSON of its sorted unique ``[rule, severity]`` pairs."""
    if findings is None or findings.empty:
        return {}
    pairs = findings[["compound_id", "rule", "severity"]].drop_duplicates()
    return {int(cid): json.dumps(sorted([r, s] for r, s in zip(g["rule"], g["severity"])), separators=(",", ":"))
            for cid, g in pairs.groupby("compound_id")}


def latest_snapshots(session: Session) -> dict[int, tuple[str, str]]:
    """compound_id -> (grade, findings_json) of its latest snapshot."""
    last = select(func.max(GradeSnapshot.id)).group_by(GradeSnapshot.compound_id).scalar_subquery()
    rows = session.execute(select(GradeSnapshot.compound_id, GradeSnapshot.grade, GradeSnapshot.findings_json)
                           .where(GradeSnapshot.id.in_(last))).all()
    return {int(c): (g, f) for c, g, f in rows}


def refresh(target: Engine | UnitOfWork, why: str, actor: str | None = None) -> dict[str, Any]:
    """Grade the portfolio, write snapshots of changed grades and close actions whose finding is gone.

    ``why`` names the write that triggered it (it goes into the notes of
    automatically closed actions).  Returns ``{snapshots, closed}``.
    """
    from .grading import grade_result

    pending = _DEFERRED.get()
    if pending is not None and not isinstance(target, UnitOfWork):
        pending.append(why)
        return {"snapshots": 0, "closed": [], "deferred": True}

    def run(session: Session) -> dict[str, Any]:
        result, _ = grade_result(session)
        comps = result.compounds
        if comps.empty:
            return {"snapshots": 0, "closed": []}
        sig = signature(result.findings)
        latest = latest_snapshots(session)
        now = utcnow()
        rows = []
        for cid, grade in zip(comps["compound_id"].astype(int), comps["grade"]):
            s = sig.get(cid, "[]")
            if latest.get(cid) != (grade, s):
                rows.append({"compound_id": cid, "grade": grade, "findings_json": s, "at": now})
        if rows:
            session.execute(insert(GradeSnapshot), rows)
            append_event(session, actor or AUTO_ACTOR, "snapshot", "grade_snapshots", None, None,
                         {"compounds": len(rows), "grades": {g: sum(r["grade"] == g for r in rows) for g in sorted({r["grade"] for r in rows})}},
                         f"grades after {why}")
        current = set(zip(result.findings["compound_id"].astype(int), result.findings["rule"])) if not result.findings.empty else set()
        closed = close_resolved(session, current, comps["compound_id"].astype(int), why)
        return {"snapshots": len(rows), "closed": closed}

    return run_write(target, run)
