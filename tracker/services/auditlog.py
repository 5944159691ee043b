"""Reading and verifying the audit trail (``krt audit show`` / ``krt audit verify``, the dashboard's log).

The trail records every write (imports, saved fits, gates, waivers, rule-setting
and user changes): who, when (UTC), what, which entity, before/after and
reason, each event chained to the previous by SHA-256
(:mod:`tracker.db.audit`); the tables are append-only in the database.  It is
modelled on 21 CFR Part 11 §11.10(e) and ALCOA+; compliance is a matter of
validated use, which this software does not claim.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from typing import Any

import pandas as pd
from sqlalchemy import select

from ..db import queries
from ..db.audit import chain_head, verify_chain
from ..db.models import AuditEvent, Compound, Decision, KineticMeasurement, PKProfile, Potency, TimeCourse
from ..db.uow import UnitOfWork
from ..errors import NotFoundError

__all__ = ["verify", "verify_decisions", "decision_fields", "show", "events_as_records"]

#: Decision columns copied into the gate's audit event; the JSON texts enter as SHA-256 digests.
DECISION_FIELDS = ("compound_id", "from_stage", "to_stage", "outcome", "by_user", "reason", "ruleset_version")

_MEASUREMENT_ENTITIES = {
    Potency: ("potency",),
    KineticMeasurement: ("kinetic_measurements", "kinetic_measurement"),
    PKProfile: ("pk_profiles", "pk_profile"),
    TimeCourse: ("time_courses", "time_course"),
}


def _digest(text: str | None) -> str | None:
    return None if text is None else hashlib.sha256(text.encode("utf-8")).hexdigest()


def _iso(at) -> str:
    if isinstance(at, dt.datetime):
        return at.astimezone(dt.timezone.utc).isoformat(timespec="microseconds")
    return str(at)


def decision_fields(decision: dict[str, Any]) -> dict[str, Any]:
    """What a gate's audit event records of its decision row: the columns, ``at``, and digests of the JSON texts.

    :func:`verify_decisions` recomputes this from the stored row, so an edited
    decision (evidence, waivers, outcome ...) no longer matches its hashed event.
    """
    out = {k: decision.get(k) for k in DECISION_FIELDS}
    out["at"] = _iso(decision.get("at"))
    out["evidence_sha256"] = _digest(decision.get("evidence_json"))
    out["waivers_sha256"] = _digest(decision.get("waivers_json"))
    return out


def verify_decisions(session) -> tuple[bool, int | None, str]:
    """Each decision against the audit event written with it (``entity_type`` decision).

    Returns ``(ok, first_broken_event_id, message)``; a decision without its
    event is reported with the decision's id.
    """
    events = {}
    for eid, entity_id, after in session.execute(
        select(AuditEvent.id, AuditEvent.entity_id, AuditEvent.after_json).where(AuditEvent.entity_type == "decision").order_by(AuditEvent.id)
    ):
        events.setdefault(entity_id, (eid, after))
    cols = [getattr(Decision, c) for c in DECISION_FIELDS] + [Decision.id, Decision.at, Decision.evidence_json, Decision.waivers_json]
    n = 0
    for row in session.execute(select(*cols).order_by(Decision.id)):
        d = row._asdict()
        found = events.get(str(d["id"]))
        if found is None:
            return False, None, f"decision {d['id']} has no audit event (written outside the gate service)"
        eid, after = found
        recorded = json.loads(after) if after else {}
        expected = decision_fields(d)
        for key, value in expected.items():
            if recorded.get(key) != value:
                return False, eid, (f"audit event {eid}: decision {d['id']} no longer matches it ({key} differs; "
                                    "the decision row was edited after it was written)")
        n += 1
    return True, None, f"{n} decision(s) match their audit events"


def verify(engine) -> dict[str, Any]:
    """The hash chain, then every decision against its event.

    ``{ok, first_broken_id, message, head_id, head_hash}``.
    """
    with UnitOfWork(engine, write=False) as uow:
        ok, broken, message = verify_chain(uow.session)
        head_id, head_hash = chain_head(uow.session)
        if ok:
            d_ok, d_broken, d_message = verify_decisions(uow.session)
            if not d_ok:
                ok, broken, message = False, d_broken, d_message
            else:
                message = f"{message}; {d_message}"
    return {"ok": ok, "first_broken_id": broken, "message": message, "head_id": head_id, "head_hash": head_hash}


def show(engine, compound: str | None = None, limit: int | None = None, newest_first: bool = False) -> pd.DataFrame:
    """Audit events, all or those about one compound.

    A compound's events: the compound itself (creation, updates, stage changes,
    waivers), its decisions, and events naming one of its measurements by id.
    Import summaries list their ids inside ``after_json`` and are not matched.
    """
    with UnitOfWork(engine, write=False) as uow:
        s = uow.session
        df = queries.audit_events(s, newest_first=newest_first)
        if compound is not None:
            cid = s.execute(select(Compound.id).where(Compound.name == compound)).scalar()
            if cid is None:
                raise NotFoundError(f"no compound named {compound!r}")
            keys = {("compound", str(cid))}
            keys |= {("decision", str(d)) for d in s.execute(select(Decision.id).where(Decision.compound_id == cid)).scalars()}
            for model, names in _MEASUREMENT_ENTITIES.items():
                for mid in s.execute(select(model.id).where(model.compound_id == cid)).scalars():
                    keys |= {(n, str(mid)) for n in names}
            mask = [(t, e) in keys for t, e in zip(df["entity_type"], df["entity_id"])]
            df = df[pd.Series(mask, index=df.index, dtype=bool)] if len(df) else df
    if limit is not None:
        df = df.head(int(limit))
    return df.reset_index(drop=True)


def events_as_records(df: pd.DataFrame) -> list[dict[str, Any]]:
    """Events as JSON-ready dicts with ``before``/``after`` decoded."""
    out = []
    for r in df.to_dict("records"):
        rec = {k: r[k] for k in ("id", "at", "actor", "action", "entity_type", "entity_id", "reason", "prev_hash", "hash")}
        rec["id"] = int(rec["id"])
        rec["entity_id"] = rec["entity_id"] if isinstance(rec["entity_id"], str) else None
        rec["reason"] = rec["reason"] if isinstance(rec["reason"], str) else None
        rec["before"] = json.loads(r["before_json"]) if isinstance(r.get("before_json"), str) else None
        rec["after"] = json.loads(r["after_json"]) if isinstance(r.get("after_json"), str) else None
        out.append(rec)
    return out
