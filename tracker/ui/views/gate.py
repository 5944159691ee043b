"""Stage gate: pick a compound and a target stage, see what blocks it, waive (leads), record the decision."""

from __future__ import annotations

from typing import Any

import pandas as pd
import streamlit as st

from tracker.domain import STAGES
from tracker.errors import GateRefused, KrtError
from tracker.ui import data, widgets
from tracker.ui.main import context
from tracker.ui.views.compound import pick_compound

STAGE_SKIP = "stage-skip"


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
    except GateRefused as exc:
        return False, widgets.one_line(exc)
    except KrtError as exc:
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
    nxt = STAGES[min(STAGES.index(stage) + 1, len(STAGES) - 1)]
    to_stage = c2.selectbox("Move to stage", targets, index=targets.index(nxt) if nxt in targets else 0, key="gate_to")
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
        who = widgets.md(ident.name) if ident else "nobody signed in"
        st.info(f"Only a lead can waive findings and record a gate decision ({who} is {ctx.role}). "
                "The findings above are what the lead will see.", icon=":material/lock:")
    else:
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
        st.caption(f"Signing as **{ident.name}**: re-enter your password to sign this decision "
                   "(21 CFR Part 11 §11.200). The record shows your printed name, the UTC time and the meaning.")
        password = st.text_input("Your password (signature)", type="password", key="gate_password")
        second_lead, second_password = "", ""
        if waivers:
            with st.expander("Second lead's signature (two-person rule)", expanded=to_stage == STAGES[-1]):
                st.caption("Waivers on the move to clinical (configurable: rule setting two_person_waiver_stage) "
                           "and waivers of your own refused request need a second lead to co-sign.")
                second_lead = st.text_input("Second lead", key="gate_second_lead")
                second_password = st.text_input("Second lead's password", type="password", key="gate_second_password")
        if st.button("Record decision", type="primary", key="gate_record", icon=":material/gavel:"):
            if not reason.strip():
                st.error("Give a reason for the decision.")
            elif missing:
                st.error(f"Give a reason for each waiver ({', '.join(missing)}).")
            elif not password:
                st.error("Re-enter your password to sign the decision.")
            else:
                ok, message = record_decision(ctx.engine, ident.name, name, to_stage, reason, waivers, password=password,
                                              second_lead=second_lead, second_password=second_password)
                for key in ("gate_password", "gate_second_password"):  # a signature is never kept for the next one
                    st.session_state.pop(key, None)
                data.clear_caches()  # approved or refused, a decision and audit events were written
                st.session_state["gate_message"] = (ok, message)
                st.rerun()
    if "gate_message" in st.session_state:
        ok, message = st.session_state.pop("gate_message")
        (st.success if ok else st.error)(widgets.md(message))

    st.subheader("Decisions on record")
    dec = data.decisions(ctx.url, ctx.version, name)
    if dec.empty:
        st.caption("No gate decisions yet for this compound.")
    else:
        st.dataframe(decisions_frame(dec), hide_index=True, placeholder="–", width="stretch")


if __name__ == "__main__":
    render()
