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
from sqlalchemy import inspect, select

from ..db import queries
from ..db.audit import chain_head, find_head, in_ranges, verify_chain, verify_checkpoints
from ..db.models import AuditEvent, Compound, Decision, KineticMeasurement, PKProfile, Potency, TimeCourse
from ..db.uow import UnitOfWork
from ..errors import InputError, NotFoundError

__all__ = ["verify", "head", "verify_decisions", "decision_fields", "show", "events_as_records"]

#: Tables verify reads (every revision since the first has them).
VERIFIED_TABLES = ("audit_events", "decisions", "compounds", "stage_history", "programs", "users", "rule_configs", "potency",
                   "kinetic_measurements", "pk_profiles", "time_courses")

#: Decision columns copied into the gate's audit event; the JSON texts enter as SHA-256 digests.
DECISION_FIELDS = ("compound_id", "from_stage", "to_stage", "outcome", "by_user", "reason", "ruleset_version")

_MEASUREMENT_ENTITIES = {
    Potency: ("potency",),
    KineticMeasurement: ("kinetic_measurements", "kinetic_measurement"),
    PKProfile: ("pk_profiles", "pk_profile"),
    TimeCourse: ("time_courses", "time_course"),
}


#: Tables whose imports are audited as one summary event each, and the line per row its ``rows_sha256`` covers.
_IMPORTED = {
    "compounds": (Compound, lambda r: f"{r[0]}\t{r[1]}", (Compound.id, Compound.name)),
    "potency": (Potency, lambda r: f"{r[0]}\t{r[1]}\t{r[2]}", (Potency.id, Potency.compound_id, Potency.content_hash)),
    "kinetic_measurements": (KineticMeasurement, lambda r: f"{r[0]}\t{r[1]}\t{r[2]}",
                             (KineticMeasurement.id, KineticMeasurement.compound_id, KineticMeasurement.content_hash)),
    "pk_profiles": (PKProfile, lambda r: f"{r[0]}\t{r[1]}\t{r[2]}", (PKProfile.id, PKProfile.compound_id, PKProfile.content_hash)),
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


def _import_events(session):
    """``(event id, table, after)`` of every import summary that names its rows (``id_ranges`` + ``rows_sha256``)."""
    stmt = (select(AuditEvent.id, AuditEvent.entity_type, AuditEvent.after_json)
            .where(AuditEvent.action == "import", AuditEvent.entity_type.in_(list(_IMPORTED))).order_by(AuditEvent.id))
    for eid, table, after in session.execute(stmt):
        try:
            rec = json.loads(after) if after else {}
        except ValueError:
            rec = {}
        if isinstance(rec, dict) and "rows_sha256" in rec and isinstance(rec.get("id_ranges"), list):
            yield eid, table, rec


def verify(engine, expect_head: str | None = None) -> dict[str, Any]:
    """The hash chain and its anchors, then every decision, import and record that drives a decision against the trail.

    ``expect_head`` is a head hash kept elsewhere (``krt audit head``): it must
    still be in the chain.  The keyed checkpoints are checked with the key of
    :func:`tracker.db.anchor.load_key` when one is configured.

    ``{ok, first_broken_id, message, head_id, head_hash, events, problems, checkpoints, anchored}``;
    ``message`` names the first problem, ``problems`` lists up to 20.
    """
    from ..db import anchor
    from . import integrity

    key = anchor.load_key()
    if expect_head is not None:
        expect_head = expect_head.strip().lower()
        if len(expect_head) != 64 or any(c not in "0123456789abcdef" for c in expect_head):
            raise InputError(f"--expect-head wants the 64 hex digits of a head hash (as 'krt audit head' prints), got {expect_head!r}")
    with UnitOfWork(engine, write=False) as uow:
        s = uow.session
        missing = [t for t in VERIFIED_TABLES if t not in set(inspect(s.connection()).get_table_names())]
        if missing:
            what = ("the audit_events table is missing" if "audit_events" in missing else
                    f"table(s) {', '.join(missing)} are missing")
            return {"ok": False, "first_broken_id": None, "head_id": 0, "head_hash": None, "events": 0, "anchored": False,
                    "checkpoints": "not checked", "problems": [what],
                    "message": f"{what} (dropped outside the application, or no schema: see 'krt db current'); "
                               "the trail cannot be verified: restore the database from a backup"}
        ok, broken, message = verify_chain(s)
        head_id, head_hash = chain_head(s)
        problems: list[tuple[int | None, str]] = [] if ok else [(broken, message)]
        parts = [message]
        cp_message = "not checked (the chain is broken)"
        if ok and expect_head is not None:
            at = find_head(s, expect_head)
            if at is None:
                problems.append((None, f"the expected head {expect_head[:12]}... is no longer in the chain (now {head_id} event(s), "
                                       f"head {head_hash[:12]}): events were cut off the end or the chain was rewritten"))
            else:
                parts.append(f"expected head found at event {at}" + (f" ({head_id - at} event(s) since)" if head_id > at else ""))
        if ok:
            cp_ok, cp_broken, cp_message = verify_checkpoints(s, key)
            if not cp_ok:
                problems.append((cp_broken, cp_message))
            else:
                parts.append(cp_message)
            d_ok, d_broken, d_message = verify_decisions(s)
            if not d_ok:
                problems.append((d_broken, d_message))
            trail = integrity.Trail(s)
            problems += integrity.check_decision_events(s, trail)
            problems += integrity.check_stages(s)
            row_problems, n_imports = integrity.check_rows(s, trail)
            problems += row_problems
            problems += integrity.check_stage_history(s, trail)
            problems += integrity.check_programs(s, trail)
            problems += integrity.check_users(s, trail)
            problems += integrity.check_rules(s, trail)
            parts += [d_message, f"{n_imports} import(s) match their rows",
                      "stages, stage history, measurements, programs, users and rule settings match their events"]
    if problems:
        broken, message = problems[0]
        if len(problems) > 1:
            message += f" (and {len(problems) - 1} more problem(s))"
        return {"ok": False, "first_broken_id": broken, "message": message, "head_id": head_id, "head_hash": head_hash,
                "events": head_id, "problems": [m for _, m in problems[:20]], "checkpoints": cp_message, "anchored": False}
    return {"ok": True, "first_broken_id": None, "message": "; ".join(parts), "head_id": head_id, "head_hash": head_hash,
            "events": head_id, "problems": [], "checkpoints": cp_message, "anchored": key is not None and head_id > 0}


def head(engine) -> dict[str, Any]:
    """The chain's head, to keep elsewhere: ``{head_hash, events, head_id, at, checkpoint, database}``.

    ``checkpoint`` is the last keyed checkpoint event's id (``None`` without one).
    """
    from ..db import anchor
    from ..db.session import mask_url

    with UnitOfWork(engine, write=False) as uow:
        s = uow.session
        head_id, head_hash = chain_head(s)
        at = s.execute(select(AuditEvent.at).where(AuditEvent.id == head_id)).scalar() if head_id else None
        cp = s.execute(select(AuditEvent.id).where(AuditEvent.action == anchor.CHECKPOINT_ACTION,
                                                  AuditEvent.entity_type == anchor.CHECKPOINT_ENTITY)
                       .order_by(AuditEvent.id.desc()).limit(1)).scalar()
    return {"head_hash": head_hash, "events": head_id, "head_id": head_id, "at": at, "checkpoint": cp,
            "database": mask_url(str(engine.url))}


def show(engine, compound: str | None = None, limit: int | None = None, newest_first: bool = False) -> pd.DataFrame:
    """Audit events, all or those about one compound.

    A compound's events: the compound itself (creation, updates, stage changes,
    waivers), its decisions, events naming one of its measurements by id, and
    the import summaries whose ``id_ranges`` hold the compound or one of its
    measurements.
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
            mine: dict[str, list[int]] = {"compounds": [cid]}
            for model, names in _MEASUREMENT_ENTITIES.items():
                ids = list(s.execute(select(model.id).where(model.compound_id == cid)).scalars())
                mine[names[0]] = ids
                for mid in ids:
                    keys |= {(n, str(mid)) for n in names}
            imports = {eid for eid, table, rec in _import_events(s)
                       if any(in_ranges(i, rec["id_ranges"]) for i in mine.get(table, ()))}
            mask = [(t, e) in keys or i in imports for t, e, i in zip(df["entity_type"], df["entity_id"], df["id"])]
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
