"""Measure next: compounds ranked by how much a kinetic measurement would change a decision."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from tracker.ui import data, theme, widgets
from tracker.ui.main import context, open_compound

TABLE_KEY = "queue_table"


def display_frame(q: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "Rank": q["rank"],
        "Compound": q["compound"],
        "Program": q["program"],
        "Series": q["series"].fillna("–"),
        "Stage": q["stage"],
        "Grade": q["grade"].map(theme.grade_label),
        "Suggested assay": q["suggested_assay"],
        "Why": q["reason"],
        "Score": q["score"],
    })


def render() -> None:
    ctx = context()
    st.title("Measure next")
    st.caption("Compounds ranked by how much a kinetic measurement would change a decision: later stages, worse grades "
               "and missing or uncertain residence times rank higher. Each row suggests the assay to run. "
               "Select a row to open the compound.")
    q = data.queue(ctx.url, ctx.version, ctx.program)
    if q.empty:
        st.success("Nothing queued: every compound that matters has a precise residence time.", icon=":material/check_circle:")
        return
    top = q.iloc[0]
    st.markdown(f"**First in line:** {widgets.md(top['compound'])} ({top['stage']}) — {widgets.md(top['suggested_assay'])}.")
    event = st.dataframe(display_frame(q), key=TABLE_KEY, on_select="rerun", selection_mode="single-row", hide_index=True, placeholder="–",
                         width="stretch", column_config={
                             "Rank": st.column_config.NumberColumn(format="%d", width="small"),
                             "Why": st.column_config.TextColumn(width="large"),
                             "Score": st.column_config.NumberColumn(format="%.1f", help="stage weight × (1 + grade rank) × uncertainty"),
                         })
    rows = event.selection.rows if event and event.selection else []
    if rows and 0 <= int(rows[0]) < len(q):
        open_compound(str(q.iloc[int(rows[0])]["compound"]))
    counts = q.groupby("suggested_assay", as_index=False).size().rename(columns={"suggested_assay": "Assay", "size": "Compounds"})
    st.subheader("Assays needed")
    st.dataframe(counts.sort_values("Compounds", ascending=False), hide_index=True, placeholder="–")


if __name__ == "__main__":
    render()
