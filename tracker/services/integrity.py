"""What ``krt audit verify`` checks beyond the hash chain: the data that drives decisions against the trail.

The hash chain proves the *events* were not changed.  These checks prove the
stored *data* still is what the events fixed, so an edit made with database
rights but outside the application (a stage set by hand, a potency value
changed, a kinetics row slipped in, a refused decision deleted, a role raised)
is named:

* **decisions** - every decision has its event and every decision event its
  row (:func:`check_decision_events`; the decision's fields against its event
  are checked in :func:`tracker.services.auditlog.verify_decisions`);
* **stages** - ``compounds.stage`` is the last approved decision's ``to_stage``
  (or the imported stage when there is none), and approved decisions follow on
  from each other (:func:`check_stages`);
* **stage history** - every row is the creation row of an imported compound or
  the row of an approved decision, with its fields (:func:`check_stage_history`);
* **measurements and compounds** - every row of ``compounds``, ``potency``,
  ``kinetic_measurements``, ``pk_profiles`` and ``time_courses`` is sealed by
  the event that wrote it (its values hashed, :mod:`tracker.db.seals`); a row
  no event wrote is reported (:func:`check_rows`);
* **programs, users, rule settings** - the stored values equal what their
  create/update events fixed, replayed in order (:func:`check_programs`,
  :func:`check_users`, :func:`check_rules`).

Each check returns a list of ``(event id or None, message)``; empty means intact.
"""

from __future__ import annotations

import bisect
import json
from collections import defaultdict
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..db.audit import _plain, rows_digest
from ..db.models import AuditEvent, Compound, Decision, KineticMeasurement, PKProfile, Potency, Program, RuleConfig, StageHistory, TimeCourse, User
from ..db.seals import ROWS_FORMAT, digest_rows

__all__ = ["Trail", "check_decision_events", "check_stages", "check_stage_history", "check_rows", "check_programs",
           "check_users", "check_rules", "ROW_TABLES"]

Problem = tuple[int | None, str]

#: Tables whose every row must be written by an audited import or saved fit, and the single-row entity names.
ROW_TABLES = {
    "compounds": (Compound, ()),
    "potency": (Potency, ("potency",)),
    "kinetic_measurements": (KineticMeasurement, ("kinetic_measurement",)),
    "pk_profiles": (PKProfile, ("pk_profile",)),
    "time_courses": (TimeCourse, ("time_course",)),
}
_OLD_LINES = {  # rows_format 1: what imports hashed before values were sealed
    "compounds": ((Compound.id, Compound.name), lambda r: f"{r[0]}\t{r[1]}"),
    "potency": ((Potency.id, Potency.compound_id, Potency.content_hash), lambda r: f"{r[0]}\t{r[1]}\t{r[2]}"),
    "kinetic_measurements": ((KineticMeasurement.id, KineticMeasurement.compound_id, KineticMeasurement.content_hash),
                             lambda r: f"{r[0]}\t{r[1]}\t{r[2]}"),
    "pk_profiles": ((PKProfile.id, PKProfile.compound_id, PKProfile.content_hash), lambda r: f"{r[0]}\t{r[1]}\t{r[2]}"),
}


def _json(text: str | None) -> Any:
    if not text:
        return None
    try:
        return json.loads(text)
    except ValueError:
        return None


def _same(stored: Any, recorded: Any) -> bool:
    stored = _plain(stored)
    if isinstance(stored, bool) or isinstance(recorded, bool):
        return bool(stored) == bool(recorded) if stored is not None and recorded is not None else stored == recorded
    if isinstance(stored, (int, float)) and isinstance(recorded, (int, float)):
        return float(stored) == float(recorded)
    return stored == recorded


class Trail:
    """The events the checks need, read once: ``(id, actor, action, entity_id, after, before)`` per entity type."""

    TYPES = ("decision", "compound", "program", "user", "rule_config", "time_course", "kinetic_measurement", "potency",
             "pk_profile", *ROW_TABLES)

    def __init__(self, session: Session):
        self.by_type: dict[str, list[dict[str, Any]]] = defaultdict(list)
        stmt = (select(AuditEvent.id, AuditEvent.actor, AuditEvent.action, AuditEvent.entity_type, AuditEvent.entity_id,
                       AuditEvent.after_json, AuditEvent.before_json)
                .where(AuditEvent.entity_type.in_(self.TYPES)).order_by(AuditEvent.id))
        for eid, actor, action, etype, entity_id, after, before in session.execute(stmt):
            self.by_type[etype].append({"id": eid, "actor": actor, "action": action, "entity_id": entity_id,
                                        "after": _json(after), "before": _json(before)})

    def of(self, entity_type: str, action: str | None = None) -> list[dict[str, Any]]:
        return [e for e in self.by_type.get(entity_type, []) if action is None or e["action"] == action]

    def imports(self, table: str) -> list[dict[str, Any]]:
        return [e for e in self.of(table, "import") if isinstance(e["after"], dict) and isinstance(e["after"].get("id_ranges"), list)]


# ------------------------------------------------------------------ decisions and stages
def _approved(session: Session) -> dict[int, list[dict[str, Any]]]:
    out: dict[int, list[dict[str, Any]]] = defaultdict(list)
    stmt = (select(Decision.id, Decision.compound_id, Decision.from_stage, Decision.to_stage, Decision.by_user, Decision.reason, Decision.at)
            .where(Decision.outcome == "approved").order_by(Decision.id))
    for row in session.execute(stmt):
        out[row.compound_id].append(row._asdict())
    return out


def check_decision_events(session: Session, trail: Trail) -> list[Problem]:
    """Every decision event names a decision row that still exists."""
    have = set(session.execute(select(Decision.id)).scalars())
    out: list[Problem] = []
    seen: set[str] = set()
    for e in trail.of("decision"):
        if e["entity_id"] in seen or not str(e["entity_id"] or "").isdigit():
            continue
        seen.add(e["entity_id"])
        if int(e["entity_id"]) not in have:
            out.append((e["id"], f"audit event {e['id']} ({e['action']}) records decision {e['entity_id']}, which is missing "
                                 "from the decisions table (deleted outside the application)"))
    return out


def import_stages(session: Session) -> dict[int, str]:
    """Per compound with approved decisions, the stage it had before the first of them (its imported stage)."""
    return {cid: ds[0]["from_stage"] for cid, ds in _approved(session).items()}


def check_stages(session: Session) -> list[Problem]:
    """``compounds.stage`` is the last approved decision's ``to_stage``; approved decisions follow on from each other."""
    approved = _approved(session)
    out: list[Problem] = []
    names = dict(session.execute(select(Compound.id, Compound.name)).all())
    created = dict(session.execute(select(StageHistory.compound_id, StageHistory.to_stage)
                                   .where(StageHistory.decision_id.is_(None)).order_by(StageHistory.id.desc())).all())
    for cid, stage in session.execute(select(Compound.id, Compound.stage).order_by(Compound.id)):
        ds = approved.get(cid)
        if not ds:  # the import's seal fixes the stage of a compound never gated; name the compound when history shows it
            if cid in created and created[cid] != stage:
                out.append((None, f"compound {names.get(cid)}: stage is {stage!r} but its stage_history creation row says "
                                  f"{created[cid]!r} and no approved decision changed it (compounds.stage or stage_history "
                                  "changed outside the application)"))
            continue
        for prev, cur in zip(ds, ds[1:]):
            if cur["from_stage"] != prev["to_stage"]:
                out.append((None, f"compound {names.get(cid)}: decision {cur['id']} starts at {cur['from_stage']!r} but the "
                                  f"approved decision {prev['id']} before it ended at {prev['to_stage']!r}"))
        if stage != ds[-1]["to_stage"]:
            out.append((None, f"compound {names.get(cid)}: stage is {stage!r} but its last approved decision {ds[-1]['id']} "
                              f"moved it to {ds[-1]['to_stage']!r} (compounds.stage changed outside the gate)"))
    return out


def check_stage_history(session: Session, trail: Trail) -> list[Problem]:
    """Each stage_history row is a compound's creation row or an approved decision's row, field for field."""
    out: list[Problem] = []
    approved = {d["id"]: d | {"compound_id": cid} for cid, ds in _approved(session).items() for d in ds}
    compounds = {r.id: r for r in session.execute(select(Compound.id, Compound.name, Compound.stage, Compound.created_at))}
    first_stage = import_stages(session)
    seen_decisions: set[int] = set()
    created: set[int] = set()
    stmt = select(StageHistory.id, StageHistory.compound_id, StageHistory.from_stage, StageHistory.to_stage, StageHistory.at,
                  StageHistory.by_user, StageHistory.decision_id, StageHistory.note).order_by(StageHistory.id)
    for r in session.execute(stmt):
        c = compounds.get(r.compound_id)
        label = f"stage_history row {r.id}" + (f" ({c.name})" if c else "")
        if r.decision_id is not None:
            d = approved.get(r.decision_id)
            if d is None:
                out.append((None, f"{label} names decision {r.decision_id}, which is not an approved decision"))
                continue
            if r.decision_id in seen_decisions:
                out.append((None, f"{label} repeats the stage change of decision {r.decision_id}"))
            seen_decisions.add(r.decision_id)
            for col, want in (("compound_id", d["compound_id"]), ("from_stage", d["from_stage"]), ("to_stage", d["to_stage"]),
                              ("by_user", d["by_user"]), ("at", d["at"]), ("note", d["reason"])):
                if getattr(r, col) != want:
                    out.append((None, f"{label}: {col} is {_plain(getattr(r, col))!r} but decision {r.decision_id} "
                                      f"recorded {_plain(want)!r} (stage_history edited outside the application)"))
                    break
        else:
            if c is None:
                out.append((None, f"{label} names compound {r.compound_id}, which does not exist"))
                continue
            want_stage = first_stage.get(r.compound_id, c.stage)
            if r.compound_id in created:
                out.append((None, f"{label} is a second creation row of {c.name} (added outside the application)"))
            elif r.from_stage is not None or r.to_stage != want_stage or r.at != c.created_at:
                out.append((None, f"{label}: the creation row of {c.name} says {r.from_stage!r} -> {r.to_stage!r} at "
                                  f"{_plain(r.at)}, but the compound was imported at {want_stage!r} at {_plain(c.created_at)} "
                                  "(stage_history edited outside the application)"))
            created.add(r.compound_id)
    for did, d in approved.items():
        if did not in seen_decisions:
            out.append((None, f"approved decision {did} has no stage_history row (deleted outside the application)"))
    return out


# ------------------------------------------------------------------ sealed rows
def _compound_overrides(session: Session, trail: Trail) -> tuple[dict[int, dict[str, Any]], list[Problem]]:
    """What later audited changes altered in each compound (stage by gates, series/smiles by imports), put back to the imported values.

    Also reports a series/smiles that is not the value its last update event set.
    """
    out: dict[int, dict[str, Any]] = defaultdict(dict)
    for cid, stage in import_stages(session).items():
        out[cid]["stage"] = stage
    last: dict[int, dict[str, tuple[int, Any]]] = defaultdict(dict)
    for e in trail.of("compound", "update"):
        if not str(e["entity_id"] or "").isdigit():
            continue
        cid = int(e["entity_id"])
        before, after = e["before"] or {}, e["after"] or {}
        for col in ("series", "smiles"):
            if col in after:
                out[cid].setdefault(col, before.get(col))
                last[cid][col] = (e["id"], after[col])
    problems: list[Problem] = []
    if last:
        rows = {r.id: r for r in session.execute(select(Compound.id, Compound.name, Compound.series, Compound.smiles)
                                                 .where(Compound.id.in_(list(last))))}
        for cid, cols in last.items():
            r = rows.get(cid)
            for col, (eid, value) in cols.items():
                if r is not None and getattr(r, col) != value:
                    problems.append((eid, f"compound {r.name}: {col} is {getattr(r, col)!r} but audit event {eid} set it to "
                                          f"{value!r} (edited outside the application)"))
    return dict(out), problems


SUPERSEDE_COLUMNS = ("superseded_by_id", "superseded_reason", "superseded_at")


def _supersede_overrides(session: Session, trail: Trail) -> tuple[dict[int, dict[str, Any]], list[Problem]]:
    """Kinetic rows marked superseded by an audited later fit: put the marks back to empty, check them against the event."""
    last: dict[int, dict[str, Any]] = {}
    for e in trail.of("kinetic_measurement", "supersede"):
        if str(e["entity_id"] or "").isdigit() and isinstance(e["after"], dict):
            last[int(e["entity_id"])] = e
    overrides = {rid: {c: None for c in SUPERSEDE_COLUMNS} for rid in last}
    problems: list[Problem] = []
    if not last:
        return overrides, problems
    cols = [c for c in SUPERSEDE_COLUMNS if c in KineticMeasurement.__table__.c]
    rows = {r[0]: r for r in session.execute(select(KineticMeasurement.id, *(KineticMeasurement.__table__.c[c] for c in cols))
                                             .where(KineticMeasurement.id.in_(list(last))))}
    for rid, e in last.items():
        r = rows.get(rid)
        if r is None:
            continue  # reported by the seal of the row itself
        for col, value in zip(cols, r[1:]):
            if col in e["after"] and not _same(value, e["after"][col]):
                problems.append((e["id"], f"kinetic_measurements row {rid}: {col} is {_plain(value)!r} but audit event {e['id']} "
                                          f"set it to {e['after'][col]!r} (edited outside the application)"))
                break
    return overrides, problems


def _old_format(session: Session, table: str, e: dict[str, Any], cache: dict[str, dict[int, str]]) -> bool:
    cols, line = _OLD_LINES[table]
    if table not in cache:
        cache[table] = {r[0]: line(r) for r in session.execute(select(*cols))}
    stored = cache[table]
    wanted = [(int(lo), int(hi)) for lo, hi in e["after"]["id_ranges"]]
    lines = [stored[i] for lo, hi in wanted for i in range(lo, hi + 1) if i in stored]
    return len(lines) == sum(hi - lo + 1 for lo, hi in wanted) and rows_digest(lines) == e["after"].get("rows_sha256")


def check_rows(session: Session, trail: Trail) -> tuple[list[Problem], int]:
    """Every import's and saved fit's seal against the rows, then rows that no event wrote.  Returns ``(problems, imports checked)``."""
    problems: list[Problem] = []
    compound_overrides, compound_problems = _compound_overrides(session, trail)
    kinetic_overrides, kinetic_problems = _supersede_overrides(session, trail)
    compound_problems += kinetic_problems
    overrides_of = {"compounds": compound_overrides, "kinetic_measurements": kinetic_overrides}
    old_cache: dict[str, dict[int, str]] = {}
    n_imports = 0
    for table, (model, single_types) in ROW_TABLES.items():
        covered: list[list[int]] = []
        for e in trail.imports(table):
            rec = e["after"]
            ranges = [(int(lo), int(hi)) for lo, hi in rec["id_ranges"]]
            expected = sum(hi - lo + 1 for lo, hi in ranges)
            covered += [[lo, hi] for lo, hi in ranges]
            n_imports += 1
            if rec.get("rows_format") == ROWS_FORMAT and isinstance(rec.get("row_columns"), list):
                try:
                    n, digest = digest_rows(session, table, list(rec["row_columns"]), ranges, overrides_of.get(table))
                except KeyError as exc:
                    problems.append((e["id"], f"audit event {e['id']}: the {table} table lost column {exc} that the import sealed"))
                    continue
                if n != expected or digest != rec.get("rows_sha256"):
                    what = ("a value was edited after the import" if n == expected
                            else "a row was removed outside the application")
                    problems.append((e["id"], f"audit event {e['id']}: the {table} rows it imported no longer match it "
                                              f"({n} of {expected} present; {what})"))
            elif "rows_sha256" in rec and table in _OLD_LINES and not _old_format(session, table, e, old_cache):
                problems.append((e["id"], f"audit event {e['id']}: the {table} rows it imported no longer match it "
                                          "(a row was removed or changed outside the application)"))
        singles: dict[int, int] = {}
        for etype in single_types:
            for e in trail.of(etype):
                if not str(e["entity_id"] or "").isdigit() or e["before"] is not None:
                    continue
                rid = int(e["entity_id"])
                singles.setdefault(rid, e["id"])
                rec = e["after"] if isinstance(e["after"], dict) else {}
                if "row_sha256" in rec and isinstance(rec.get("row_columns"), list):
                    n, digest = digest_rows(session, table, list(rec["row_columns"]), [(rid, rid)], overrides_of.get(table))
                    if n == 0:
                        problems.append((e["id"], f"audit event {e['id']}: {table} row {rid} it wrote is missing (deleted outside the application)"))
                    elif digest != rec["row_sha256"]:
                        problems.append((e["id"], f"audit event {e['id']}: {table} row {rid} no longer matches the values it "
                                                  "recorded (edited outside the application)"))
        union = _merge(covered)
        expected_rows = sum(hi - lo + 1 for lo, hi in union) + sum(1 for rid in singles if not _inside(rid, union))
        if count_rows(session, model) == expected_rows:
            continue  # every id the events name is present (seals above) and there is no other row
        ref = model.compound_id if table != "compounds" else model.id
        for rid, cid in session.execute(select(model.id, ref).order_by(model.id)):
            if rid in singles or _inside(rid, union):
                continue
            name = session.execute(select(Compound.name).where(Compound.id == cid)).scalar()
            problems.append((None, f"{table} row {rid}" + (f" ({name})" if name else "") +
                             " was written by no audited import or fit (inserted outside the application)"))
            break
    return compound_problems + problems, n_imports


def _merge(ranges: list[list[int]]) -> list[list[int]]:
    out: list[list[int]] = []
    for lo, hi in sorted(ranges):
        if out and lo <= out[-1][1] + 1:
            out[-1][1] = max(out[-1][1], hi)
        else:
            out.append([lo, hi])
    return out


def _inside(value: int, merged: list[list[int]]) -> bool:
    i = bisect.bisect_right(merged, [value, float("inf")]) - 1
    return i >= 0 and merged[i][0] <= value <= merged[i][1]


# ------------------------------------------------------------------ programs, users, rule settings
def _replay(events: list[dict[str, Any]], keys: tuple[str, ...] | None = None) -> dict[int, tuple[dict[str, Any], int]]:
    state: dict[int, tuple[dict[str, Any], int]] = {}
    for e in events:
        if not str(e["entity_id"] or "").isdigit() or not isinstance(e["after"], dict):
            continue
        rid = int(e["entity_id"])
        values, _ = state.get(rid, ({}, 0))
        values = dict(values)
        values.update({k: v for k, v in e["after"].items() if keys is None or k in keys})
        state[rid] = (values, e["id"])
    return state


def check_programs(session: Session, trail: Trail) -> list[Problem]:
    """Each program's stored fields equal its create event overlaid with its update events."""
    state = _replay(sorted(trail.of("program", "create") + trail.of("program", "update"), key=lambda e: e["id"]))
    cols = [c for c in Program.__table__.columns if c.name not in ("id", "created_at")]
    out: list[Problem] = []
    for row in session.execute(select(Program.id, *cols).order_by(Program.id)):
        rec = row._asdict()
        got = state.get(rec["id"])
        if got is None:
            out.append((None, f"program {rec['name']} (row {rec['id']}) was created by no audited import (inserted outside the application)"))
            continue
        values, eid = got
        for col, want in values.items():
            if col in rec and not _same(rec[col], want):
                out.append((eid, f"program {rec['name']}: {col} is {_plain(rec[col])!r} but its audit events fixed {want!r} "
                                 "(edited outside the application)"))
                break
    return out


def check_users(session: Session, trail: Trail) -> list[Problem]:
    """Each user's name, role and active flag equal what their audit events set, replayed in order."""
    state = _replay(trail.of("user"), ("name", "role", "active"))
    out: list[Problem] = []
    for row in session.execute(select(User.id, User.name, User.role, User.active).order_by(User.id)):
        got = state.get(row.id)
        if got is None:
            out.append((None, f"user {row.name} (row {row.id}) was added by no audited user change (inserted outside the application)"))
            continue
        values, eid = got
        for col in ("name", "role", "active"):
            if col in values and not _same(getattr(row, col), values[col]):
                out.append((eid, f"user {row.name}: {col} is {_plain(getattr(row, col))!r} but audit event {eid} set it to "
                                 f"{values[col]!r} (users.{col} edited outside the application)"))
                break
    return out


def check_rules(session: Session, trail: Trail) -> list[Problem]:
    """Each stored rule setting equals the event that wrote it (program, version, settings); no row without one."""
    events = {int(e["entity_id"]): e for e in trail.of("rule_config") if str(e["entity_id"] or "").isdigit() and isinstance(e["after"], dict)}
    programs = dict(session.execute(select(Program.id, Program.name)).all())
    out: list[Problem] = []
    have: set[int] = set()
    for row in session.execute(select(RuleConfig.id, RuleConfig.program_id, RuleConfig.version, RuleConfig.config_json).order_by(RuleConfig.id)):
        have.add(row.id)
        e = events.get(row.id)
        label = f"rule_configs row {row.id} ({programs.get(row.program_id, 'global') if row.program_id else 'global'}, version {row.version})"
        if e is None:
            out.append((None, f"{label} was written by no audited rule change (inserted outside the application)"))
            continue
        rec = e["after"]
        prog = programs.get(row.program_id) if row.program_id is not None else None
        if rec.get("program") != prog or rec.get("version") != row.version or _json(row.config_json) != rec.get("settings"):
            out.append((e["id"], f"{label} no longer matches audit event {e['id']} (rule settings edited outside the application)"))
    for rid, e in events.items():
        if rid not in have:
            out.append((e["id"], f"audit event {e['id']} records rule_configs row {rid}, which is missing (deleted outside the application)"))
    return out


def count_rows(session: Session, model) -> int:
    return int(session.execute(select(func.count()).select_from(model)).scalar_one())
