"""Actions on findings: a finding's decision prompt becomes work with an owner, a due date and a status.

* :func:`add_action` opens an action on a compound's *current* finding of a
  rule (the finding's prompt is kept with it); the owner must be an active user.
* :func:`close_action` marks it ``done`` (optional note) or ``dropped`` (a note
  is required: why it is no longer worth doing).
* :func:`list_actions` -> the JSON contract of ``krt action list --json``:
  ``{id, compound, rule, owner, due, status, note}`` plus ``prompt``,
  ``overdue``, ``created_by``, ``created_at``, ``closed_by``, ``closed_at``.
* :func:`close_resolved` closes open actions whose finding has disappeared
  (data, gates or rule settings changed), with a note saying why; the grading
  refresh after every write calls it (:mod:`tracker.services.history`).

Leads and scientists may open and close actions; viewers may not (roles are
checked here, for the CLI and the dashboard alike).  Every change appends an
audit event in the same transaction.
"""

from __future__ import annotations

import datetime as dt
from typing import Any, Iterable

from sqlalchemy import Engine, insert, select, update
from sqlalchemy.orm import Session

from ..db.audit import append_event, append_events
from ..db.models import Action, Compound, utcnow
from ..db.uow import UnitOfWork
from ..domain import ACTION_STATUSES
from ..errors import InputError, NotFoundError
from .users import get_user, require_role, run_write

__all__ = ["add_action", "close_action", "list_actions", "close_resolved", "parse_due", "ACTION_STATUSES", "WRITERS", "AUTO_ACTOR"]

#: Roles that may open and close actions.
WRITERS = ("lead", "scientist")
#: The actor recorded when the grading refresh closes an action on its own.
AUTO_ACTOR = "krt (automatic)"
MAX_NOTE = 2000


def parse_due(text: Any) -> dt.date:
    """``YYYY-MM-DD`` (or a date) -> date; anything else is an input error."""
    if isinstance(text, dt.datetime):
        return text.date()
    if isinstance(text, dt.date):
        return text
    try:
        return dt.date.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError(f"due date {text!r} is not a date: use YYYY-MM-DD") from None


def _note(text: str | None) -> str | None:
    t = " ".join(str(text or "").split())
    if len(t) > MAX_NOTE:
        raise InputError(f"note is longer than {MAX_NOTE} characters")
    return t or None


def _public(row: dict[str, Any], compound: str) -> dict[str, Any]:
    due = row["due"]
    return {
        "id": int(row["id"]), "compound": compound, "rule": row["rule"], "owner": row["owner"],
        "due": due.isoformat() if due else None, "status": row["status"], "note": row.get("note"),
        "prompt": row.get("prompt"),
    }


def add_action(target: Engine | UnitOfWork, compound: str, rule: str, owner: str, due: Any, note: str | None = None,
               *, by: str | None) -> dict[str, Any]:
    """Open an action on ``compound``'s current finding of ``rule``; returns the action (``list_actions`` keys)."""
    from .grading import grade_compound

    rule = str(rule or "").strip()
    owner = " ".join(str(owner or "").split())
    if not owner:
        raise InputError("an action needs an owner (--owner USER)")
    due_date = parse_due(due)
    note = _note(note)

    def run(session: Session) -> dict[str, Any]:
        actor = require_role(session, by, WRITERS, "open actions")["name"]
        owner_row = get_user(session, owner)
        if owner_row is None or not owner_row["active"]:
            raise InputError(f"owner {owner!r} is not an active user (see krt user list)")
        cid = session.execute(select(Compound.id).where(Compound.name == compound)).scalar_one_or_none()
        if cid is None:
            raise NotFoundError(f"no compound named {compound!r}")
        entry, _, _ = grade_compound(session, compound)
        finding = next((f for f in entry["findings"] if f["rule"] == rule), None)
        if finding is None:
            have = ", ".join(dict.fromkeys(f["rule"] for f in entry["findings"])) or "none"
            raise InputError(f"{compound} has no current finding of rule {rule!r} (its findings: {have})")
        row = {"compound_id": int(cid), "rule": rule, "prompt": finding.get("prompt"), "owner": owner, "due": due_date,
               "status": "open", "note": note, "created_by": actor, "created_at": utcnow()}
        aid = session.execute(insert(Action).returning(Action.id), [row]).scalar_one()
        public = _public(dict(row, id=aid), compound)
        append_event(session, actor, "create", "action", aid, None, public, note)
        return public

    return run_write(target, run)


def close_action(target: Engine | UnitOfWork, action_id: int, status: str, note: str | None = None, *, by: str | None) -> dict[str, Any]:
    """Mark an open action ``done`` or ``dropped`` (dropping needs a note); returns the action."""
    if status not in ("done", "dropped"):
        raise InputError(f"an action is closed as done or dropped, not {status!r}")
    note = _note(note)
    if status == "dropped" and not note:
        raise InputError("dropping an action needs a note saying why (--note TEXT)")

    def run(session: Session) -> dict[str, Any]:
        actor = require_role(session, by, WRITERS, "close actions")["name"]
        row = session.execute(select(Action, Compound.name).join(Compound, Compound.id == Action.compound_id)
                              .where(Action.id == int(action_id))).first()
        if row is None:
            raise NotFoundError(f"no action {action_id}")
        a, compound = row
        before = _public(_row(a), compound)
        if a.status != "open":
            raise InputError(f"action {action_id} is already {a.status}")
        new_note = note if note is not None else a.note
        session.execute(update(Action).where(Action.id == a.id, Action.status == "open")
                        .values(status=status, note=new_note, closed_by=actor, closed_at=utcnow()))
        after = dict(before, status=status, note=new_note)
        append_event(session, actor, status, "action", a.id, before, after, note)
        return after

    return run_write(target, run)


def _row(a: Action) -> dict[str, Any]:
    return {c: getattr(a, c) for c in ("id", "rule", "owner", "due", "status", "note", "prompt")}


def list_actions(bind, *, include_closed: bool = False, compound: str | None = None, today: dt.date | None = None) -> list[dict[str, Any]]:
    """Open actions (``include_closed``: every action), oldest due date first, with ``overdue``."""
    today = today or dt.date.today()
    stmt = (select(Action, Compound.name).join(Compound, Compound.id == Action.compound_id)
            .order_by(Action.due, Action.id))
    if not include_closed:
        stmt = stmt.where(Action.status == "open")
    if compound is not None:
        stmt = stmt.where(Compound.name == compound)

    def run(session: Session) -> list[dict[str, Any]]:
        out = []
        for a, name in session.execute(stmt).all():
            d = _public(_row(a), name)
            d.update({"overdue": a.status == "open" and a.due < today, "created_by": a.created_by,
                      "created_at": a.created_at.isoformat() if a.created_at else None, "closed_by": a.closed_by,
                      "closed_at": a.closed_at.isoformat() if a.closed_at else None})
            out.append(d)
        return out

    if isinstance(bind, UnitOfWork):
        return run(bind.session)
    if isinstance(bind, Session):
        return run(bind)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def close_resolved(session: Session, current: Iterable[tuple[int, str]], graded: Iterable[int], why: str) -> list[int]:
    """Close (``done``) the open actions on graded compounds whose (compound id, rule) finding is gone.

    ``current``: the (compound_id, rule) pairs of every current finding;
    ``graded``: the compound ids that were graded (others are left alone).
    Runs inside the caller's writing transaction; returns the closed ids.
    """
    have = set(current)
    graded_ids = set(graded)
    rows = session.execute(select(Action, Compound.name).join(Compound, Compound.id == Action.compound_id)
                           .where(Action.status == "open")).all()
    gone = [(a, name) for a, name in rows if a.compound_id in graded_ids and (a.compound_id, a.rule) not in have]
    if not gone:
        return []
    now = utcnow()
    events = []
    for a, name in gone:
        note = f"closed automatically: {name} no longer has a {a.rule} finding ({why})"
        before = _public(_row(a), name)
        session.execute(update(Action).where(Action.id == a.id, Action.status == "open")
                        .values(status="done", note=note, closed_by=AUTO_ACTOR, closed_at=now))
        events.append({"actor": AUTO_ACTOR, "action": "done", "entity_type": "action", "entity_id": a.id,
                       "before": before, "after": dict(before, status="done", note=note), "reason": note})
    append_events(session, events)
    return [a.id for a, _ in gone]
