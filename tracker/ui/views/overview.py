"""Risk overview: every compound with its grade, top finding and the numbers behind it."""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from tracker.domain import STAGES
from tracker.ui import charts, data, theme, widgets
from tracker.ui.main import context, open_compound

PAGE_SIZE = 100
TABLE_KEY = "overview_table"

SORTS = {
    "Grade (worst first)": (["grade_rank", "stage_rank", "compound"], [True, False, True]),
    "Stage (latest first)": (["stage_rank", "grade_rank", "compound"], [False, True, True]),
    "Compound": (["compound"], [True]),
    "Residence time (longest first)": (["residence_time_s", "compound"], [False, True]),
    "Worst predicted fold (largest first)": (["worst_fold_shift", "compound"], [False, True]),
    "Best potency (tightest first)": (["best_potency_M", "compound"], [True, True]),
}


def filter_sort(df: pd.DataFrame, grades: list[str], sort: str) -> pd.DataFrame:
    """Grade filter (labels) and sort, vectorised; NaN sorts last."""
    if grades:
        df = df[df["grade_label"].isin(grades)]
    cols, asc = SORTS[sort]
    return df.sort_values(cols, ascending=asc, na_position="last", kind="mergesort").reset_index(drop=True)


def display_frame(df: pd.DataFrame) -> pd.DataFrame:
    """The table's columns in display units (numbers stay numeric so column sorting works)."""
    inc = df["best_incubation_s"]
    return pd.DataFrame({
        "Compound": df["compound"],
        "Program": df["program"],
        "Series": df["series"].fillna("–"),
        "Stage": df["stage"],
        "Grade": df["grade_label"],
        "Top finding": [_top(r, m) for r, m in zip(df["top_rule"], df["top_message"])],
        "RT (h)": df["residence_time_s"] / 3600.0,
        "Best potency (nM)": df["best_potency_M"] / 1e-9,
        "Readout @ incubation": [_readout(r, t) for r, t in zip(df["best_readout"], inc)],
        "Worst fold (pred.)": df["worst_fold_shift"],
        "Worst reading": df["worst_reading"].fillna("–"),
        "Findings": df["n_findings"],
    })


def grade_cell_style(label: object) -> str:
    """CSS for a grade cell: the grade's colour as background (same palette everywhere)."""
    g = theme.style_for_label(label)
    if g is theme.UNGRADED:
        return f"color: {g.colour}"
    return f"background-color: {g.colour}; color: white; font-weight: 600"


def styled(df: pd.DataFrame):
    """The display frame with coloured grade cells (a page of at most PAGE_SIZE rows)."""
    return df.style.map(grade_cell_style, subset=["Grade"])


def _top(rule, message) -> str:
    if not isinstance(rule, str) or not rule:
        return ""
    return f"{widgets.rule_title(rule)}: {message}" if isinstance(message, str) else widgets.rule_title(rule)


def _readout(readout, t) -> str:
    if not isinstance(readout, str):
        return "–"
    return f"{readout} @ {widgets.dur(t)}"


COLUMN_CONFIG = {
    "Compound": st.column_config.TextColumn(width="small", pinned=True),
    "Grade": st.column_config.TextColumn(width="medium"),
    "Top finding": st.column_config.TextColumn(width="large"),
    "RT (h)": st.column_config.NumberColumn(format="%.3g", help="Residence time 1/koff as the grader uses it (runs combined; "
                                            "conflicting runs: the longest), hours"),
    "Best potency (nM)": st.column_config.NumberColumn(format="%.3g", help="Tightest potency value on record, nM"),
    "Worst fold (pred.)": st.column_config.NumberColumn(
        format="%.3g×", help="Apparent / true affinity predicted for the compound's worst reading (farthest from 1 either way), "
                             "from the residence time; the grader's number"),
    "Worst reading": st.column_config.TextColumn(width="medium", help="Which reading the worst fold belongs to"),
    "Findings": st.column_config.NumberColumn(format="%d", width="small"),
}


def render() -> None:
    ctx = context()
    st.title("Risk overview")
    st.caption(f"{widgets.md(ctx.program or 'All programs')} · kinetic risk of every compound, worst first. "
               "Select a row to open the compound's evidence.")
    with st.container(horizontal=True):
        stages = st.multiselect("Stage", STAGES, key="ov_stage", placeholder="all stages")
        series = st.multiselect("Series", data.series_names(ctx.url, ctx.version, ctx.program), key="ov_series", placeholder="all series")
        grades = st.multiselect("Grade", list(theme.GRADE_LABELS[:-1]), key="ov_grade", placeholder="all grades")
        search = st.text_input("Search compound or series", key="ov_search", placeholder="e.g. HF-10")
        sort = st.selectbox("Sort by", list(SORTS), key="ov_sort")
    flt = data.SummaryFilter(program=ctx.program, stages=tuple(stages), series=tuple(series), search=search)
    full = data.portfolio(ctx.url, ctx.version, flt)
    df = filter_sort(full, grades, sort)

    counts = df["grade_key"].value_counts()
    cols = st.columns(4)
    for col, key in zip(cols, ("high", "moderate", "low", "clear")):
        g = theme.GRADES[key]
        col.metric(g.badge, int(counts.get(key, 0)))

    high = df.loc[df["grade_key"] == "high", "compound"].tolist()
    if high:
        more = f" and {len(high) - 12} more" if len(high) > 12 else ""
        st.markdown(f"**Needs attention ({theme.GRADES['high'].badge}):** {widgets.md(', '.join(high[:12]))}{more}")

    total = len(df)
    n_pages = max(1, math.ceil(total / PAGE_SIZE))
    page_no = 1
    if n_pages > 1:
        page_no = st.number_input(f"Page (of {n_pages}, {PAGE_SIZE} rows each)", 1, n_pages, 1, key="ov_page")
    start = (page_no - 1) * PAGE_SIZE
    page_df = df.iloc[start : start + PAGE_SIZE].reset_index(drop=True)
    st.caption(f"{total:,} compound(s) match; showing {start + 1 if total else 0}–{start + len(page_df)}.")
    event = st.dataframe(
        styled(display_frame(page_df)), key=TABLE_KEY, placeholder="–", on_select="rerun", selection_mode="single-row",
        hide_index=True, column_config=COLUMN_CONFIG, width="stretch", height=min(38 + 35 * max(len(page_df), 1), 560),
    )
    rows = event.selection.rows if event and event.selection else []
    if rows:
        pos = int(rows[0])
        if 0 <= pos < len(page_df):
            open_compound(str(page_df.iloc[pos]["compound"]))

    st.subheader("Grades by stage and program")
    counts_df = charts.grade_counts_frame(df)
    if counts_df.empty:
        st.info("No compounds match the filters.")
    else:
        st.altair_chart(charts.grade_counts_chart(counts_df), width="content")
    ungraded = int((df["grade_key"] == "ungraded").sum())
    if ungraded:
        st.caption(f"{ungraded} compound(s) were not graded (no result from the grader).")


if __name__ == "__main__":
    render()
