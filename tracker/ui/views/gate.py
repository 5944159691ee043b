"""Stage gate: pick a compound and a target stage, see what blocks it, waive (leads), record the decision."""

from __future__ import annotations

import uuid
from typing import Any

import pandas as pd
import streamlit as st

from tracker.domain import STAGES
from tracker.errors import GateRefused, KrtError
from tracker.ui import data, widgets
from tracker.ui.main import context
from tracker.ui.views.compound import pick_compound

STAGE_SKIP = "stage-skip"
REFUSED_PREFIX = "Refused and recorded: "


def blocking(findings: list[dict[str, Any]], from_stage: str, to_stage: str) -> list[dict[str, Any]]:
    """What stands in the way of ``from_stage -> to_stage``: unwaived high findings and a skipped stage.

    Mirrors the gate service's rules for display only; the service decides.
    """
    i, j = STAGES.index(from_stage), STAGES.index(to_stage)
    if j <= i:
        return []
    out = [f for f in findings if f.get("severity") == "high"]
    seen, uniq = set(), []
    for f in out:
        if f["rule"] not in seen:
            seen.add(f["rule"])
            uniq.append(f)
    if j - i > 1:
        uniq.append({"rule": STAGE_SKIP, "severity": "high",
                     "message": f"The move skips {', '.join(STAGES[i + 1 : j])}.",
                     "prompt": "Waive only when the skipped stage's evidence exists elsewhere."})
    return uniq


def record_decision(engine, by: str, compound: str, to_stage: str, reason: str, waivers: dict[str, str],
                    password: str | None = None, second_lead: str | None = None,
                    second_password: str | None = None) -> tuple[bool, str]:
    """Ask the gate service to record a decision signed with ``password`` (and co-signed by ``second_lead``);
    returns ``(approved, one-line message)``.  Refusals are recorded by the service; a failed signature records nothing."""
    from tracker.services.gates import request_gate, signature_text

    try:
        result = request_gate(engine, compound, to_stage, by=by, reason=reason, waivers=waivers or None,
                              password=password, second_lead=second_lead or None, second_password=second_password or None)
    except GateRefused as exc:  # recorded as a refused decision
        return False, REFUSED_PREFIX + widgets.one_line(exc)
    except KrtError as exc:  # nothing recorded
        return False, widgets.one_line(exc)
    used = [k for k, v in result["waivers"].items() if v.get("used")]
    text = (f"Approved: {compound} moved {result['from_stage']} → {result['to_stage']} "
            f"(decision {result['decision_id']}, grade {result['grade']}"
            + (f", waived: {', '.join(used)}" if used else "") + "). Signed: "
            + "; ".join(signature_text(sig) for sig in result["signatures"]) + ".")
    return True, text


def decisions_frame(df: pd.DataFrame) -> pd.DataFrame:
    if df.empty:
        return df
    return pd.DataFrame({
        "#": df["id"], "When (UTC)": df["at"].dt.strftime("%Y-%m-%d %H:%M"), "From": df["from_stage"].fillna("–"),
        "To": df["to_stage"], "Outcome": df["outcome"], "By": df["by_user"], "Reason": df["reason"].fillna(""),
        "Rule set": df["ruleset_version"].fillna(""),
        "Signed (printed name, UTC time: meaning)": df["signatures"] if "signatures" in df else "",
    })


def render() -> None:
    ctx = context()
    st.title("Stage gate")
    widgets.safety_box()
    name = pick_compound(ctx)
    if name is None:
        return
    info = data.compound(ctx.url, ctx.version, name)
    graded = data.findings_of(data.grades(ctx.url, ctx.version, ctx.program), name) or {}
    stage = info["compound"]["stage"]
    findings = graded.get("findings") or []
    c1, c2 = st.columns([2, 3])
    with c1:
        st.markdown(f"**{widgets.md(name)}** is at **{stage}**")
        widgets.badge(graded.get("grade"))
    targets = [s for s in STAGES if s != stage]
    # No target is pre-selected: after a decision the compound sits at a new stage, and the form must not
    # offer the next move on its own.
    to_stage = c2.selectbox("Move to stage", targets, index=None, placeholder="choose the target stage", key="gate_to")
    if "gate_message" in st.session_state:
        ok, message = st.session_state.pop("gate_message")
        (st.success if ok else st.error)(widgets.md(message))
    if to_stage is None:
        _findings_overview(findings)
        if not (ctx.identity and ctx.identity.is_lead):
            _lead_only(ctx)
        _decisions_on_record(ctx, name)
        return
    forward = STAGES.index(to_stage) > STAGES.index(stage)
    blocks = blocking(findings, stage, to_stage)

    st.subheader("What blocks this move" if forward else "Moving back")
    if not forward:
        st.info("A move back needs a lead and a reason; findings do not block it.")
    elif not blocks:
        st.success("Nothing blocks this move: no high finding and no skipped stage.", icon=":material/check_circle:")
    for f in blocks:
        widgets.finding_card(f)
    others = [f for f in findings if f not in blocks]
    if others:
        with st.expander(f"Other findings ({len(others)})", expanded=False):
            widgets.findings_list(others)

    ident = ctx.identity
    st.subheader("Decision")
    if not (ident and ident.is_lead):
        _lead_only(ctx)
        _decisions_on_record(ctx, name)
        return
    waivers: dict[str, str] = {}
    for f in blocks:
        rule = f["rule"]
        if st.checkbox(f"Waive {rule}", key=f"gate_waive_{rule}"):
            why = st.text_input(f"Reason for waiving {rule}", key=f"gate_why_{rule}",
                                placeholder="why this finding does not stop the move")
            waivers[rule] = why.strip()
    reason = st.text_area("Reason for the decision", key="gate_reason",
                          placeholder="e.g. portfolio review 2026-12: kinetics follow-up agreed")
    missing = [r for r, why in waivers.items() if not why]
    unwaived = [f["rule"] for f in blocks if f["rule"] not in waivers]
    st.caption(f"Signing as **{widgets.md(ident.name)}**: re-enter your password to sign this decision "
               "(21 CFR Part 11 §11.200). The record shows your printed name, the UTC time and the meaning.")
    password = st.text_input("Your password (signature)", type="password", key="gate_password")
    second_lead, second_password = "", ""
    if waivers:
        with st.expander("Second lead's signature (two-person rule)", expanded=to_stage == STAGES[-1]):
            st.caption("Waivers on the move to clinical (configurable: rule setting two_person_waiver_stage) "
                       "and waivers of your own refused request need a second lead to co-sign.")
            second_lead = st.text_input("Second lead", key="gate_second_lead")
            second_password = st.text_input("Second lead's password", type="password", key="gate_second_password")

    pending = st.session_state.get(PENDING_KEY)
    if pending and pending["compound"] == name and pending["from"] == stage and pending["to"] == to_stage:
        _confirm(ctx, ident.name, pending, password, second_lead, second_password)
    else:
        st.session_state.pop(PENDING_KEY, None)
        if st.button(action_label(name, stage, to_stage, unwaived), type="primary", key="gate_record",
                     icon=":material/gavel:"):
            if not reason.strip():
                st.error("Give a reason for the decision.")
            elif missing:
                st.error(f"Give a reason for each waiver ({', '.join(missing)}).")
            elif not password:
                st.error("Re-enter your password to sign the decision.")
            else:  # the next run shows what will be recorded and asks for a confirmation
                st.session_state[PENDING_KEY] = {"nonce": uuid.uuid4().hex, "compound": name, "from": stage,
                                                 "to": to_stage, "reason": reason.strip(), "waivers": dict(waivers),
                                                 "unwaived": unwaived}
                st.rerun()
    _decisions_on_record(ctx, name)


PENDING_KEY = "gate_pending"
DONE_KEY = "gate_done_nonces"
FORM_KEYS_PREFIX = ("gate_to", "gate_reason", "gate_password", "gate_second_lead", "gate_second_password",
                    "gate_waive_", "gate_why_")


def action_label(compound: str, from_stage: str, to_stage: str, unwaived: list[str]) -> str:
    """What the button will do, in words; a blocked move says that it is blocked."""
    if STAGES.index(to_stage) < STAGES.index(from_stage):
        return f"Review: move {compound} back, {from_stage} → {to_stage}"
    if unwaived:
        return (f"Review: request {from_stage} → {to_stage} (blocked by {len(unwaived)} finding(s): "
                "it will be refused and recorded)")
    return f"Review: advance {compound}, {from_stage} → {to_stage}"


def _reset_form() -> None:
    """Clear every input of the decision form, so the next decision starts from nothing."""
    for key in list(st.session_state.keys()):
        if isinstance(key, str) and key.startswith(FORM_KEYS_PREFIX):
            del st.session_state[key]
    st.session_state.pop(PENDING_KEY, None)


def _confirm(ctx, by: str, pending: dict[str, Any], password: str, second_lead: str, second_password: str) -> None:
    """The confirmation step: from → to and the findings being waived; records once per request."""
    waived = ", ".join(f"{rule} ({widgets.md(why)})" for rule, why in pending["waivers"].items()) or "none"
    verb = "Move back" if STAGES.index(pending["to"]) < STAGES.index(pending["from"]) else "Advance"
    blocked = f" Still blocked by: {', '.join(pending['unwaived'])}; the request will be refused and recorded." \
        if pending["unwaived"] else ""
    st.warning(f"**Confirm the decision.** {verb} **{widgets.md(pending['compound'])}**: **{pending['from']} → {pending['to']}**. "
               f"Waived findings: {waived}. Reason: {widgets.md(pending['reason'])}.{blocked}", icon=":material/gavel:")
    c1, c2 = st.columns(2)
    confirm = c1.button(f"Confirm and sign: {pending['from']} → {pending['to']}", type="primary", key="gate_confirm")
    if c2.button("Cancel", key="gate_cancel"):
        st.session_state.pop(PENDING_KEY, None)
        st.rerun()
    if not confirm:
        return
    done: set[str] = st.session_state.setdefault(DONE_KEY, set())
    if pending["nonce"] in done:  # a repeated submit of the same request records nothing more
        st.session_state["gate_message"] = (True, "This decision was already recorded; nothing more was written.")
    else:
        ok, message = record_decision(ctx.engine, by, pending["compound"], pending["to"], pending["reason"],
                                      pending["waivers"], password=password, second_lead=second_lead,
                                      second_password=second_password)
        st.session_state["gate_message"] = (ok, message)
        if not ok and not message.startswith(REFUSED_PREFIX):
            # nothing was recorded (e.g. a wrong password): keep the form, never the passwords
            for key in ("gate_password", "gate_second_password"):
                st.session_state.pop(key, None)
            st.session_state.pop(PENDING_KEY, None)
            st.rerun()
        done.add(pending["nonce"])
        data.clear_caches()  # approved or refused, a decision and audit events were written
        st.session_state["gate_message"] = (ok, message)
    _reset_form()
    st.rerun()


def _lead_only(ctx) -> None:
    who = widgets.md(ctx.identity.name) if ctx.identity else "nobody signed in"
    st.info(f"Only a lead can waive findings and record a gate decision ({who} is {ctx.role}). "
            "The findings above are what the lead will see.", icon=":material/lock:")


def _findings_overview(findings: list[dict[str, Any]]) -> None:
    if findings:
        with st.expander(f"Findings ({len(findings)})", expanded=True):
            widgets.findings_list(findings)
    st.caption("Choose the target stage to see what blocks the move and to record a decision.")


def _decisions_on_record(ctx, name: str) -> None:
    st.subheader("Decisions on record")
    dec = data.decisions(ctx.url, ctx.version, name)
    if dec.empty:
        st.caption("No gate decisions yet for this compound.")
    else:
        st.dataframe(decisions_frame(dec), hide_index=True, placeholder="–", width="stretch")


if __name__ == "__main__":
    render()
