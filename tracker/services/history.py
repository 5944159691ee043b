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

__all__ = ["refresh", "deferred", "latest_snapshots", "signature", "changes", "changes_markdown_lines", "parse_since",
           "read_pack_stamp", "record_pack", "last_pack_time", "PACK_META"]

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


# ------------------------------------------------------------------ what changed since a date or a review pack
RANK = {"high": 0, "moderate": 1, "low": 2, "clear": 3}
PACK_META = "krt-review-pack"


def read_pack_stamp(text: str) -> dict[str, Any] | None:
    """The stamp (``created_at``, ``audit_head_id``, ...) a review pack carries in its ``<meta>``, or None."""
    import html as html_mod
    import re

    m = re.search(r"<meta name='" + PACK_META + r"' content='([^']*)'>", text[:20000])
    return json.loads(html_mod.unescape(m.group(1))) if m else None


def record_pack(target: Engine | UnitOfWork, text: str, by: str | None) -> dict[str, Any] | None:
    """Note in the audit trail that a review pack was built (its stamp), so the next pack can say what changed since."""
    stamp = read_pack_stamp(text)
    if stamp is None:
        return None
    return run_write(target, lambda s: append_event(s, by or "anonymous", "build", "review_pack", stamp.get("audit_head_id"),
                                                    None, stamp, "review pack built"))


def last_pack_time(bind) -> Any:
    """When the last recorded review pack was built (UTC datetime), or None."""
    import datetime as dt

    from ..db.models import AuditEvent

    def run(s: Session):
        row = s.execute(select(AuditEvent.after_json).where(AuditEvent.entity_type == "review_pack", AuditEvent.action == "build")
                        .order_by(AuditEvent.id.desc()).limit(1)).scalar()
        return dt.datetime.fromisoformat(json.loads(row)["created_at"]) if row else None

    if isinstance(bind, Session):
        return run(bind)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def parse_since(text: str) -> tuple[Any, str]:
    """``YYYY-MM-DD`` (start of that day, UTC), an ISO date-time, or the path of a review pack -> (UTC datetime, label)."""
    import datetime as dt
    from pathlib import Path

    from ..errors import InputError

    raw = str(text or "").strip()
    if not raw:
        raise InputError("--since needs a date (YYYY-MM-DD) or a review pack file")
    path = Path(raw)
    if path.suffix.lower() in (".html", ".htm") or path.is_file():
        if not path.is_file():
            raise InputError(f"{raw}: no such review pack file")
        stamp = read_pack_stamp(path.read_text(encoding="utf-8", errors="replace"))
        if stamp is None:
            raise InputError(f"{raw}: not a review pack of this tool (no {PACK_META} stamp; packs built before the stamp cannot be used)")
        when = dt.datetime.fromisoformat(stamp["created_at"])
        return when.astimezone(dt.timezone.utc), f"review pack {path.name} (built {when:%Y-%m-%d %H:%M} UTC)"
    try:
        if len(raw) == 10:
            d = dt.date.fromisoformat(raw)
            return dt.datetime(d.year, d.month, d.day, tzinfo=dt.timezone.utc), raw
        when = dt.datetime.fromisoformat(raw)
    except ValueError:
        raise InputError(f"--since {raw!r}: give a date (YYYY-MM-DD), a date-time or a review pack file") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=dt.timezone.utc)
    return when.astimezone(dt.timezone.utc), raw


def changes(bind, since) -> dict[str, Any]:
    """Everything since ``since`` (UTC datetime): grade moves, new and resolved findings, new measurements,
    gate decisions, actions opened and closed.  Grades come from the snapshots (module docstring)."""
    from sqlalchemy import and_

    from ..db.models import Action, Compound, Decision, KineticMeasurement, PKProfile, Potency, TimeCourse

    def run(s: Session) -> dict[str, Any]:
        names = dict(s.execute(select(Compound.id, Compound.name)).all())
        before_ids = select(func.max(GradeSnapshot.id)).where(GradeSnapshot.at <= since).group_by(GradeSnapshot.compound_id).scalar_subquery()
        old = {int(c): (g, f) for c, g, f in s.execute(select(GradeSnapshot.compound_id, GradeSnapshot.grade, GradeSnapshot.findings_json)
                                                        .where(GradeSnapshot.id.in_(before_ids))).all()}
        new = latest_snapshots(s)
        grades, f_new, f_gone = [], [], []
        for cid, (g_now, f_now) in sorted(new.items(), key=lambda kv: names.get(kv[0], "")):
            g_then, f_then = old.get(cid, (None, "[]"))
            name = names.get(cid, str(cid))
            if g_then != g_now:
                direction = "new" if g_then is None else ("up" if RANK[g_now] < RANK[g_then] else "down")
                grades.append({"compound": name, "from": g_then, "to": g_now, "direction": direction})
            then_rules = {r: sev for r, sev in json.loads(f_then)}
            now_rules = {r: sev for r, sev in json.loads(f_now)}
            f_new += [{"compound": name, "rule": r, "severity": sev} for r, sev in sorted(now_rules.items()) if r not in then_rules]
            f_gone += [{"compound": name, "rule": r, "severity": sev} for r, sev in sorted(then_rules.items()) if r not in now_rules]
        measurements = []
        for table, model in (("potency", Potency), ("kinetics", KineticMeasurement), ("pk", PKProfile), ("time_courses", TimeCourse)):
            for cid, n in s.execute(select(model.compound_id, func.count()).where(model.created_at > since).group_by(model.compound_id)).all():
                measurements.append({"compound": names.get(int(cid), str(cid)), "table": table, "rows": int(n)})
        measurements.sort(key=lambda m: (m["compound"], m["table"]))
        decisions = [{"compound": names.get(int(d.compound_id)), "from_stage": d.from_stage, "to_stage": d.to_stage, "outcome": d.outcome,
                      "by": d.by_user, "at": d.at.isoformat(), "reason": d.reason}
                     for d in s.execute(select(Decision).where(Decision.at > since).order_by(Decision.id)).scalars()]

        def act(a: Action, when) -> dict[str, Any]:
            return {"id": a.id, "compound": names.get(a.compound_id), "rule": a.rule, "owner": a.owner, "due": a.due.isoformat(),
                    "status": a.status, "note": a.note, "at": when.isoformat() if when else None}

        opened = [act(a, a.created_at) for a in s.execute(select(Action).where(Action.created_at > since).order_by(Action.id)).scalars()]
        closed = [act(a, a.closed_at) for a in s.execute(select(Action).where(and_(Action.closed_at.is_not(None), Action.closed_at > since))
                                                          .order_by(Action.closed_at, Action.id)).scalars()]
        return {"since": since.isoformat(), "grades": grades, "findings_new": f_new, "findings_resolved": f_gone,
                "measurements": measurements, "decisions": decisions, "actions_opened": opened, "actions_closed": closed}

    if isinstance(bind, UnitOfWork):
        return run(bind.session)
    if isinstance(bind, Session):
        return run(bind)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def changes_markdown_lines(ch: dict[str, Any]) -> list[str]:
    """The changes as short lines of plain text (CLI, dashboard and the review pack share them)."""
    from .. import fmt

    lines = []
    for g in ch["grades"]:
        arrow = {"up": "worse", "down": "better", "new": "first graded"}[g["direction"]]
        lines.append(f"grade {g['compound']}: {fmt.grade_label(g['from']) if g['from'] else '–'} -> {fmt.grade_label(g['to'])} ({arrow})")
    lines += [f"new finding {f['compound']}: {f['rule']} ({f['severity']})" for f in ch["findings_new"]]
    lines += [f"resolved finding {f['compound']}: {f['rule']} (was {f['severity']})" for f in ch["findings_resolved"]]
    lines += [f"new measurements {m['compound']}: {m['rows']} {m['table']} row(s)" for m in ch["measurements"]]
    lines += [f"gate {d['compound']}: {d['from_stage']} -> {d['to_stage']} {d['outcome']} by {d['by']}" for d in ch["decisions"]]
    lines += [f"action opened #{a['id']} {a['compound']} {a['rule']} for {a['owner']} due {a['due']}" for a in ch["actions_opened"]]
    lines += [f"action closed #{a['id']} {a['compound']} {a['rule']}: {a['status']}" + (f" ({a['note']})" if a.get("note") else "")
              for a in ch["actions_closed"]]
    return lines
