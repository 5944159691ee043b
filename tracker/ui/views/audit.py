"""Audit trail: every write, newest first, filterable; and the hash-chain integrity check."""

from __future__ import annotations

import datetime as dt
import math

import pandas as pd
import streamlit as st

from tracker.ui import data
from tracker.ui.main import context

PAGE_SIZE = 100
ANY = "any"


def verify(engine) -> dict:
    """The audit service's hash-chain check: ``{ok, first_broken_id, message, head_id, head_hash}``."""
    from tracker.services.auditlog import verify as verify_chain

    return verify_chain(engine)


def display_frame(df: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "#": df["id"],
        "When (UTC)": df["at"].str.slice(0, 19).str.replace("T", " "),
        "Who": df["actor"],
        "Action": df["action"],
        "What": df["entity_label"],
        "Reason": df["reason"].fillna(""),
        "Change (before → after)": df["change"],
        "Hash": df["hash"].str.slice(0, 12),
    })


def render() -> None:
    ctx = context()
    st.title("Audit trail")
    st.caption("Every import, saved fit, user change, waiver and gate decision appends one event. Each event's hash covers "
               "its content and the previous hash, so an edited, removed or re-ordered event breaks the chain.")
    c1, c2 = st.columns([1, 3])
    if c1.button("Verify integrity", type="primary", icon=":material/verified:", key="audit_verify"):
        result = verify(ctx.engine)
        message = result["message"]
        if result["ok"]:
            message += f" (last event {result['head_id']}, hash {result['head_hash'][:16]}…)"
        else:
            message = f"Integrity check FAILED: {message}"
        st.session_state["audit_result"] = (result["ok"], message)
    if "audit_result" in st.session_state:
        ok, message = st.session_state["audit_result"]
        (c2.success if ok else c2.error)(message)

    choices = data.audit_choices(ctx.url, ctx.version)
    f = st.columns(5)
    actor = f[0].selectbox("Who", [ANY] + choices["actor"], key="audit_actor")
    action = f[1].selectbox("Action", [ANY] + choices["action"], key="audit_action")
    entity = f[2].selectbox("Entity", [ANY] + choices["entity_type"], key="audit_entity")
    text = f[3].text_input("Contains", key="audit_text", placeholder="compound, id or reason")
    dates = f[4].date_input("Between (UTC)", value=(), key="audit_dates", max_value=dt.date.today() + dt.timedelta(days=1))
    since = until = None
    if isinstance(dates, (tuple, list)) and len(dates) == 2:
        since, until = dates[0].isoformat(), dates[1].isoformat()
    flt = data.AuditFilter(actor=None if actor == ANY else actor, action=None if action == ANY else action,
                           entity_type=None if entity == ANY else entity, text=text, since=since, until=until)
    _, total = data.audit(ctx.url, ctx.version, flt, 1, 0)
    n_pages = max(1, math.ceil(total / PAGE_SIZE))
    page_no = st.number_input(f"Page (of {n_pages})", 1, n_pages, 1, key="audit_page") if n_pages > 1 else 1
    df, total = data.audit(ctx.url, ctx.version, flt, PAGE_SIZE, (page_no - 1) * PAGE_SIZE)
    st.caption(f"{total:,} event(s) match.")
    if df.empty:
        st.info("No audit events match.")
        return
    st.dataframe(display_frame(df), hide_index=True, placeholder="–", width="stretch",
                 column_config={"Change (before → after)": st.column_config.TextColumn(width="large"),
                                "What": st.column_config.TextColumn(width="medium")})


if __name__ == "__main__":
    render()
