"""What changed: grades up or down, new and resolved findings, new measurements, gate decisions and actions,
since a date or since the last review pack (tracker.services.history)."""

from __future__ import annotations

import datetime as dt

import pandas as pd
import streamlit as st

from tracker import fmt
from tracker.ui import widgets
from tracker.ui.main import context

SECTIONS = (
    ("grades", "Grades that moved", {"compound": "Compound", "from": "From", "to": "To", "direction": "Direction"}),
    ("findings_new", "New findings", {"compound": "Compound", "rule": "Rule", "severity": "Severity"}),
    ("findings_resolved", "Resolved findings", {"compound": "Compound", "rule": "Rule", "severity": "Was"}),
    ("measurements", "New measurements", {"compound": "Compound", "table": "Table", "rows": "Rows"}),
    ("decisions", "Gate decisions", {"compound": "Compound", "from_stage": "From", "to_stage": "To", "outcome": "Outcome", "by": "By", "reason": "Reason"}),
    ("actions_opened", "Actions opened", {"id": "#", "compound": "Compound", "rule": "Rule", "owner": "Owner", "due": "Due"}),
    ("actions_closed", "Actions closed", {"id": "#", "compound": "Compound", "rule": "Rule", "status": "Status", "note": "Note"}),
)


def frame(rows: list[dict], columns: dict[str, str]) -> pd.DataFrame:
    df = pd.DataFrame(rows, columns=list(columns))
    for col in ("from", "to"):
        if col in df and columns.get(col) in ("From", "To") and "direction" in columns:
            df[col] = df[col].map(lambda g: fmt.grade_label(g) if g else "–")
    if "rule" in df:
        df["rule"] = df["rule"].map(widgets.rule_title)
    return df.rename(columns=columns)


def render() -> None:
    from tracker.services.history import changes, last_pack_time

    ctx = context()
    st.title("What changed")
    last = last_pack_time(ctx.engine)
    options = ["A date"] + (["The last review pack"] if last else [])
    how = st.radio("Since", options, index=len(options) - 1, horizontal=True, key="ch_how")
    if how == "A date":
        day = st.date_input("Since", value=dt.date.today() - dt.timedelta(days=7), key="ch_date")
        since = dt.datetime(day.year, day.month, day.day, tzinfo=dt.timezone.utc)
        st.caption(f"Since {day:%Y-%m-%d} 00:00 UTC.")
    else:
        since = last
        st.caption(f"Since the last review pack, built {last:%Y-%m-%d %H:%M} UTC.")
    ch = changes(ctx.engine, since)
    total = sum(len(ch[k]) for k, _, _ in SECTIONS)
    cols = st.columns(4)
    cols[0].metric("Grades moved", len(ch["grades"]))
    cols[1].metric("Findings new / resolved", f"{len(ch['findings_new'])} / {len(ch['findings_resolved'])}")
    cols[2].metric("Gate decisions", len(ch["decisions"]))
    cols[3].metric("Actions opened / closed", f"{len(ch['actions_opened'])} / {len(ch['actions_closed'])}")
    if not total:
        st.info("Nothing changed in this period.")
        return
    for key, title, columns in SECTIONS:
        if ch[key]:
            st.subheader(title)
            st.dataframe(frame(ch[key], columns), hide_index=True, width="stretch", key=f"ch_{key}")
    st.caption("Grades come from snapshots written whenever a write changes a grade; history starts at the first such write.")


if __name__ == "__main__":
    render()
