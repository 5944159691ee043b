"""Actions on the dashboard: open and overdue actions by owner (landing page), and a compound's actions
with the forms to open one from a finding and to close it (compound page).

Thin: every read and write goes through :mod:`tracker.services.actions`, which
checks the role of the signed-in user and audits every change.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import pandas as pd
import streamlit as st

from ..errors import KrtError
from . import data, widgets

COLUMNS = ["id", "compound", "rule", "owner", "due", "status", "note", "overdue", "prompt"]


@st.cache_data(ttl=data.TTL_S, max_entries=data.MAX_ENTRIES, show_spinner=False)
def actions_frame(url: str, ver: tuple[int, int], include_closed: bool = False) -> pd.DataFrame:
    from ..services.actions import list_actions

    rows = list_actions(data.get_engine(url), include_closed=include_closed)
    return pd.DataFrame(rows, columns=COLUMNS) if rows else pd.DataFrame(columns=COLUMNS)


def by_owner(actions: pd.DataFrame) -> pd.DataFrame:
    """Open actions counted per owner, with how many are overdue and the next due date (vectorised)."""
    if actions.empty:
        return pd.DataFrame(columns=["Owner", "Open", "Overdue", "Next due"])
    open_ = actions[actions["status"] == "open"]
    g = open_.groupby("owner", sort=True)
    out = pd.DataFrame({"Open": g.size(), "Overdue": g["overdue"].sum().astype(int), "Next due": g["due"].min()})
    out = out.reset_index().rename(columns={"owner": "Owner"})
    return out.sort_values(["Overdue", "Open", "Owner"], ascending=[False, False, True], kind="mergesort").reset_index(drop=True)


def owner_summary(ctx) -> None:
    """Landing page: open and overdue actions by owner, and the overdue ones listed."""
    acts = actions_frame(ctx.url, ctx.version)
    st.subheader("Actions by owner")
    if acts.empty:
        st.caption("No open actions. Open one from a finding on a compound's page.")
        return
    summary = by_owner(acts)
    cols = st.columns([2, 3])
    cols[0].dataframe(summary, hide_index=True, width="stretch", key="ov_actions_owner")
    late = acts[acts["overdue"].astype(bool)]
    with cols[1]:
        if late.empty:
            st.caption(f"{len(acts)} open action(s), none overdue.")
        else:
            st.markdown(f"**Overdue ({len(late)})**")
            st.dataframe(pd.DataFrame({"Due": late["due"], "Owner": late["owner"], "Compound": late["compound"],
                                       "Finding": late["rule"].map(widgets.rule_title), "Note": late["note"].fillna("")}),
                         hide_index=True, width="stretch", key="ov_actions_late")


def compound_actions(ctx, compound: str, findings: list[dict[str, Any]]) -> None:
    """Compound page: this compound's actions, a form to open one from a finding, buttons to close one."""
    from ..services.actions import add_action, close_action

    st.subheader("Actions")
    acts = actions_frame(ctx.url, ctx.version, include_closed=True)
    mine = acts[acts["compound"] == compound]
    ident = ctx.identity
    can_write = bool(ident and ident.can_write and ident.registered)
    if "action_message" in st.session_state:
        ok, message = st.session_state.pop("action_message")
        (st.success if ok else st.error)(message)
    if mine.empty:
        st.caption("No actions on this compound yet.")
    for a in mine.itertuples(index=False):
        with st.container(border=True):
            late = " · **overdue**" if a.overdue else ""
            st.markdown(f"**#{a.id} {widgets.rule_title(a.rule)}** · owner {a.owner} · due {a.due} · {a.status}{late}")
            if isinstance(a.note, str) and a.note:
                st.caption(a.note)
            if a.status == "open" and can_write:
                c = st.columns([1, 3, 1])
                if c[0].button("Mark done", key=f"act_done_{a.id}"):
                    _write(lambda: close_action(ctx.engine, int(a.id), "done", by=ident.name), f"Action #{a.id} marked done.")
                why = c[1].text_input("Why drop it", key=f"act_why_{a.id}", placeholder="a note is required to drop",
                                      label_visibility="collapsed")
                if c[2].button("Drop", key=f"act_drop_{a.id}"):
                    _write(lambda: close_action(ctx.engine, int(a.id), "dropped", why, by=ident.name), f"Action #{a.id} dropped.")
    if not findings:
        return
    if not can_write:
        st.caption("Leads and scientists can open actions from these findings.")
        return
    users = data.users(ctx.url, ctx.version)
    owners = sorted(users.loc[users["active"].astype(bool), "name"]) if not users.empty else []
    rules = list(dict.fromkeys(f["rule"] for f in findings))
    with st.form("act_new", clear_on_submit=True, border=True):
        st.markdown("**Open an action from a finding**")
        c = st.columns([2, 2, 1])
        rule = c[0].selectbox("Finding", rules, format_func=widgets.rule_title, key="act_rule")
        owner = c[1].selectbox("Owner", owners, index=owners.index(ident.name) if ident.name in owners else 0, key="act_owner")
        due = c[2].date_input("Due", value=dt.date.today() + dt.timedelta(days=14), key="act_due")
        note = st.text_input("Note", key="act_note", placeholder="optional: what exactly, which assay")
        st.caption("The action carries the finding's decision prompt (shown in the finding above).")
        if st.form_submit_button("Open action", type="primary"):
            _write(lambda: add_action(ctx.engine, compound, rule, owner, due, note, by=ident.name),
                   f"Action opened on {compound}: {widgets.rule_title(rule)} for {owner}, due {due}.")


def _write(fn, success: str) -> None:
    try:
        fn()
    except KrtError as exc:
        st.session_state["action_message"] = (False, widgets.one_line(exc))
    else:
        st.session_state["action_message"] = (True, success)
    data.clear_caches()
    st.rerun()


__all__ = ["actions_frame", "by_owner", "owner_summary", "compound_actions"]
