"""Stage gates: a lead moves a compound to another stage, on the evidence of its grade.

``request_gate(engine, compound, to_stage, by, reason, waivers)`` grades the
compound (with its series as context) inside one writing transaction and then
either approves or refuses the move.

A forward move is **refused** when

* ``by`` is not an active ``lead`` (unknown users, scientists, viewers and
  deactivated users may not decide gates, nor waive);
* a ``high`` finding of a rule is not waived (``waivers`` maps rule id ->
  reason);
* the move skips a stage (``hit`` -> ``lead-optimization``) without the
  ``stage-skip`` waiver;
* the compound is already at that stage.

A move back (a demotion) needs a lead and a reason but no waivers: findings
argue for it, not against.  Every waiver needs a reason; ``--waive RULE``
without its own reason takes the gate's reason.  Waiver names are checked
(a rule id or ``stage-skip``) so a typo cannot silently waive nothing.

Either way one :class:`~tracker.db.models.Decision` row is written.  An
approved decision carries the **evidence snapshot** (grade, findings, rule-set
version and settings, ids of every measurement the grade relied on); in the
same transaction the compound's stage is updated, a ``stage_history`` row
added and audit events appended (the decision, the stage change, each
waiver).  A **refused attempt is recorded too** (outcome ``refused``, with its
reasons and the same snapshot, plus an audit event), so the trail shows who
tried what and why it was stopped (ALCOA+: attributable, complete); then
:class:`~tracker.errors.GateRefused` is raised with a one-line message.
Unknown compounds and unknown stages are input errors and record nothing.

**Signed decisions** (21 CFR Part 11 §11.50, §11.70, §11.200).  Every gate
decision is signed: the decider re-enters their password at that moment
(``password``; checked against its argon2 hash inside the writing
transaction).  A wrong or missing password, an unknown or deactivated user
records nothing.  Each signature is a row of the append-only ``signatures``
table, linked to its decision, with the signer's printed name, the UTC time
and the meaning (``approved`` or ``refused``; ``waived`` for the waivers;
``co-signed`` for a second lead), and an audit event in the hash chain.

**Two-person rule.**  Waivers on a move into the stage set by the rule setting
``two_person_waiver_stage`` (default ``clinical``: the ``candidate`` ->
``clinical`` step) or later need a second, different lead's signature
(``second_lead`` and ``second_password``); so does any waiver by a lead whose
own request for the same move was refused before (nobody waives their own
refused request alone).  Without it the gate is refused and recorded.

The decision, signature and audit tables are append-only in the database
itself.  The audit trail is modelled on 21 CFR Part 11 §11.10(e) and ALCOA+;
whether a deployment complies is a matter of its validated use, not of this
code.
"""

from __future__ import annotations

import json
from typing import Any, Mapping

from sqlalchemy import Engine, insert, select, update
from sqlalchemy.orm import Session

from ..db.audit import append_events, canonical_json
from ..db.models import Compound, Decision, Signature, StageHistory, utcnow
from ..db.uow import UnitOfWork
from ..domain import STAGES, canonical
from ..errors import GateRefused, InputError, NotFoundError, PermissionDenied
from ..rules import config as rc
from .auditlog import decision_fields
from .grading import grade_compound, load_configs
from .users import get_user, printed_name, run_write, verify_signer

__all__ = ["request_gate", "preview_gate", "gate_reasons", "parse_waivers", "decision_evidence", "STAGE_SKIP",
           "needs_second_lead", "signature_text"]

STAGE_SKIP = rc.STAGE_SKIP


def parse_waivers(items) -> dict[str, str | None]:
    """``["residence-time-unmeasured", "stage-skip:reason text"]`` -> ``{rule: reason or None}``.

    Also accepts a mapping.  Unknown waiver names raise :class:`InputError`.
    """
    if not items:
        return {}
    pairs = items.items() if isinstance(items, Mapping) else (str(i).split(":", 1) if ":" in str(i) else (str(i), None) for i in items)
    out: dict[str, str | None] = {}
    for name, why in pairs:
        key = str(name).strip().lower()
        if key not in rc.WAIVABLE:
            raise InputError(f"unknown waiver {name!r}: waive one of {', '.join(rc.WAIVABLE)}")
        out[key] = (why or "").strip() or None
    return out


def _stage(text: str) -> str:
    s = canonical(text, STAGES)
    if s is None:
        raise InputError(f"unknown stage {text!r}: use one of {', '.join(STAGES)}")
    return s


def _lock_compound(session: Session, name: str):
    stmt = select(Compound.id, Compound.name, Compound.stage).where(Compound.name == name)
    if session.get_bind().dialect.name == "postgresql":
        stmt = stmt.with_for_update()  # serialise concurrent gates on one compound (SQLite: BEGIN IMMEDIATE)
    return session.execute(stmt).first()


def gate_reasons(compound: str, from_stage: str, to_stage: str, by: str, user: dict | None, findings: list[dict],
                 waivers: Mapping[str, Any]) -> tuple[list[str], list[str], list[str]]:
    """Why a move would be refused (empty: it passes), which waivers it uses, and the high-finding rules.

    Pure: ``user`` is ``{role, active}`` or None for an unknown name; ``findings`` the compound's findings.
    """
    i_from, i_to = STAGES.index(from_stage), STAGES.index(to_stage)
    reasons: list[str] = []
    if user is None:
        reasons.append(f"unknown user {by!r} (only a registered lead may decide gates)")
    elif not user["active"]:
        reasons.append(f"user {by!r} is deactivated")
    elif user["role"] != "lead":
        reasons.append(f"user {by!r} is a {user['role']}; only a lead may decide gates" + (" or grant waivers" if waivers else ""))
    if i_to == i_from:
        reasons.append(f"{compound} is already at {from_stage}")
    high = sorted({f["rule"] for f in findings if f["severity"] == "high"}, key=rc.RULES.index)
    used: list[str] = []
    if i_to > i_from:  # forward: high findings and skipped stages need waivers
        for rule in high:
            if rule in waivers:
                used.append(rule)
            else:
                reasons.append(f"unwaived high finding {rule}")
        if i_to - i_from > 1:
            if STAGE_SKIP in waivers:
                used.append(STAGE_SKIP)
            else:
                reasons.append(f"the move skips {', '.join(STAGES[i_from + 1 : i_to])} (waive {STAGE_SKIP} to allow it)")
    return reasons, used, high


def needs_second_lead(to_stage: str, waivers_used: list[str], settings: rc.RuleConfig, own_refusal: bool) -> str | None:
    """Why this move's waivers need a second lead's signature (two-person rule), or ``None``.  Pure."""
    if not waivers_used:
        return None
    if STAGES.index(to_stage) >= int(round(settings.two_person_waiver_stage)):
        return f"waivers on a move to {to_stage} need a second lead's signature (two-person rule)"
    if own_refusal:
        return "nobody waives their own refused request alone: a second lead must co-sign (two-person rule)"
    return None


def signature_text(sig: Mapping[str, Any]) -> str:
    """``Lena Novak (lena), 2026-03-01 09:15:02 UTC: approved, as lead`` (one line)."""
    at = sig["at"]
    if isinstance(at, str):
        import datetime as dt

        at = dt.datetime.fromisoformat(at)
    stamp = at.strftime("%Y-%m-%d %H:%M:%S UTC") if hasattr(at, "strftime") else str(at)
    who = sig["printed_name"] if sig["printed_name"] == sig["signer"] else f"{sig['printed_name']} ({sig['signer']})"
    return f"{who}, {stamp}: {sig['meaning']}, as {sig['role']}"


def _own_refusal(session: Session, compound_id: int, frm: str, to: str, by: str) -> bool:
    stmt = select(Decision.id).where(Decision.compound_id == compound_id, Decision.from_stage == frm, Decision.to_stage == to,
                                     Decision.outcome == "refused", Decision.by_user == by).limit(1)
    return session.execute(stmt).first() is not None


def preview_gate(bind, compound: str, to_stage: str, by: str | None = None, waivers=None) -> dict[str, Any]:
    """What :func:`request_gate` would decide now, without writing anything (for the dashboard's gate review).

    Returns ``{compound, from_stage, to_stage, grade, findings, blocking, would_pass, reasons}``;
    ``blocking`` lists the high findings a forward move must waive.  Without ``by`` the user check is left out.
    """
    to = _stage(to_stage)
    wv = parse_waivers(waivers)

    def run(session: Session) -> dict[str, Any]:
        row = session.execute(select(Compound.stage).where(Compound.name == compound)).first()
        if row is None:
            raise NotFoundError(f"no compound named {compound!r}")
        entry, _, _ = grade_compound(session, compound)
        user = get_user(session, by) if by else {"role": "lead", "active": True}
        reasons, _, high = gate_reasons(compound, row.stage, to, by or "", user, entry["findings"], wv)
        return {"compound": compound, "from_stage": row.stage, "to_stage": to, "grade": entry["grade"], "findings": entry["findings"],
                "blocking": [r for r in high if r not in wv] if STAGES.index(to) > STAGES.index(row.stage) else [],
                "would_pass": not reasons, "reasons": reasons}

    if isinstance(bind, UnitOfWork):
        return run(bind.session)
    if isinstance(bind, Session):
        return run(bind)
    with UnitOfWork(bind, write=False) as uow:
        return run(uow.session)


def request_gate(
    target: Engine | UnitOfWork,
    compound: str,
    to_stage: str,
    by: str,
    reason: str,
    waivers=None,
    *,
    password: str | None = None,
    second_lead: str | None = None,
    second_password: str | None = None,
) -> dict[str, Any]:
    """Approve or refuse moving ``compound`` to ``to_stage`` (see the module docstring), signed by ``by``
    with ``password`` (and co-signed by ``second_lead`` with ``second_password`` where the two-person rule
    applies).

    Returns the recorded decision (``decision_id``, ``outcome`` ``approved``,
    ``from_stage``, ``to_stage``, ``grade``, ``findings``, ``waivers``,
    ``ruleset_version``, ``measurements``, ``signatures``).  Raises
    :class:`GateRefused` after recording a refused attempt, and
    :class:`PermissionDenied` (recording nothing) when the signature fails.
    """
    to = _stage(to_stage)
    reason = " ".join(str(reason or "").split())
    if not reason:
        raise InputError("a gate decision needs a reason (--reason TEXT)")
    wv = parse_waivers(waivers)
    wv = {k: (v or reason) for k, v in wv.items()}
    by = " ".join(str(by or "").split())
    if not by:
        raise InputError("a gate decision needs the deciding user (sign in first)")
    second = " ".join(str(second_lead or "").split()) or None
    if second is not None and second == by:
        raise PermissionDenied(f"the second signature must come from another lead, not {by!r} again (two-person rule)")

    def run(session: Session) -> dict[str, Any]:
        row = _lock_compound(session, compound)
        if row is None:
            raise NotFoundError(f"no compound named {compound!r}")
        entry, result, portfolio = grade_compound(session, compound)
        program = entry["program"]
        configs, versions = load_configs(session, [program])
        frm = row.stage
        signer = verify_signer(session, by, password, ("lead", "scientist", "viewer"), "sign a gate decision")
        user = get_user(session, by)
        cosigner = verify_signer(session, second, second_password, ("lead",), "co-sign a waiver") if second else None
        reasons, used, high = gate_reasons(compound, frm, to, by, user, entry["findings"], wv)
        two_person = needs_second_lead(to, used, configs[program], _own_refusal(session, int(row.id), frm, to, by))
        if two_person and cosigner is None:
            reasons.append(two_person)
        outcome = "refused" if reasons else "approved"
        measurements = portfolio.measurement_ids(int(row.id))
        snapshot = {
            "compound": compound,
            "program": program,
            "stage": frm,
            "grade": entry["grade"],
            "findings": entry["findings"],
            "ruleset_version": versions[program],
            "rule_settings": configs[program].to_dict(),
            "measurements": measurements,
            "graded_at": utcnow().isoformat(),
        }
        waivers_record = {k: {"reason": v, "used": k in used} for k, v in wv.items()}
        now = utcnow()
        decision = {
            "compound_id": int(row.id), "from_stage": frm, "to_stage": to, "outcome": outcome, "by_user": by,
            "reason": reason if outcome == "approved" else f"{reason} [refused: {'; '.join(reasons)}]",
            "waivers_json": canonical_json(waivers_record) if wv else None,
            "evidence_json": canonical_json(snapshot), "ruleset_version": versions[program], "at": now,
        }
        did = session.execute(insert(Decision).returning(Decision.id), [decision]).scalar_one()
        public = decision_fields(decision)
        public.update({"compound": compound, "grade": entry["grade"], "waivers": waivers_record,
                       "high_findings": high, "measurements": measurements})
        events = []
        if outcome == "refused":
            events.append(_event(by, "gate-refused", "decision", did, None, public | {"reasons": reasons}, reason))
        else:
            events.append(_event(by, "gate-approved", "decision", did, None, public, reason))
            session.execute(update(Compound).where(Compound.id == row.id).values(stage=to))
            session.execute(insert(StageHistory), [{"compound_id": int(row.id), "from_stage": frm, "to_stage": to, "at": now,
                                                    "by_user": by, "decision_id": did, "note": reason}])
            events.append(_event(by, "stage-change", "compound", int(row.id), {"stage": frm}, {"stage": to, "decision_id": did}, reason))
            for rule, why in wv.items():
                events.append(_event(by, "waive", "compound", int(row.id), None,
                                     {"rule": rule, "decision_id": did, "used": rule in used}, why))
        signatures = [(signer, outcome)]
        if outcome == "approved" and used:
            signatures.append((signer, "waived"))
        if outcome == "approved" and cosigner is not None:
            signatures.append((cosigner, "co-signed"))
        signed = []
        for u, meaning in signatures:
            sig = {"decision_id": did, "signer": u["name"], "printed_name": printed_name(u), "role": u["role"],
                   "meaning": meaning, "at": now}
            sid = session.execute(insert(Signature).returning(Signature.id), [sig]).scalar_one()
            record = {k: v for k, v in sig.items() if k != "at"} | {"at": now.isoformat(), "compound": compound,
                                                                    "signature_id": sid}
            events.append(_event(u["name"], "sign", "signature", sid, None, record,
                                 f"{sig['printed_name']} signed decision {did}: {meaning}, as {u['role']} (password re-entered)"))
            signed.append(record)
        append_events(session, events)
        return {
            "decision_id": did, "outcome": outcome, "compound": compound, "program": program, "from_stage": frm,
            "to_stage": to, "by": by, "reason": reason, "reasons": reasons, "grade": entry["grade"],
            "findings": entry["findings"], "waivers": waivers_record, "ruleset_version": versions[program],
            "measurements": measurements, "signatures": signed,
        }

    result = run_write(target, run)
    if result["outcome"] == "approved" and not isinstance(target, UnitOfWork):
        from .history import refresh

        refresh(target, f"gate decision {result['decision_id']} ({result['from_stage']} -> {result['to_stage']})", by)
    if result["outcome"] == "refused":
        arrow = f"{result['from_stage']} -> {result['to_stage']}"
        raise GateRefused(f"gate refused for {compound} ({arrow}): {'; '.join(result['reasons'])} "
                          f"[recorded as decision {result['decision_id']}]", result["reasons"])
    return result


def _event(actor, action, entity_type, entity_id, before, after, reason) -> dict[str, Any]:
    return {"actor": actor, "action": action, "entity_type": entity_type, "entity_id": entity_id,
            "before": before, "after": after, "reason": reason}


def decision_evidence(text: str | None) -> dict[str, Any]:
    """The evidence snapshot of a stored decision as a dict."""
    return json.loads(text) if text else {}
