"""Risk overview: every compound with its grade, top finding and the numbers behind it."""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from tracker.domain import STAGES
from tracker import fmt
from tracker.ui import actions, charts, data, theme, widgets
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


PROMPT_CHARS = 110  # the "What it needs" text; the cell shows its start, hovering shows it whole
# Column widths (px) add up to what a 1440 px screen leaves beside the sidebar, selection column included.


def display_frame(df: pd.DataFrame) -> pd.DataFrame:
    """What a lead reads in ten seconds, one line per compound and no sideways scrolling at 1440 px:
    the grade, what the compound needs (the top finding's decision prompt), its residence time, the worst
    reading's predicted fold (and which reading), and the best potency with its units.  Every number is
    the evidence model's, formatted by :mod:`tracker.fmt`; program and series are filters, not columns."""
    return pd.DataFrame({
        "Compound": df["compound"],
        "Grade": df["grade_label"],
        "Stage": df["stage"],
        "What it needs": [_needs(rule, prompt) for rule, prompt in zip(df["top_rule"], df["top_prompt"])],
        "RT": [fmt.duration(v, missing="–") for v in df["residence_time_s"]],
        "Worst fold": [_worst(f, r) for f, r in zip(df["worst_fold_shift"], df["worst_reading"])],
        "Best potency": [_potency(r, v) for r, v in zip(df["best_readout"], df["best_potency_M"])],
    })


def _needs(rule: object, prompt: object) -> str:
    if not isinstance(rule, str) or not rule:
        return "nothing flagged"
    text = " ".join(str(prompt).split()) if isinstance(prompt, str) and prompt.strip() else widgets.rule_title(rule)
    return text if len(text) <= PROMPT_CHARS else text[: PROMPT_CHARS - 1].rstrip() + "…"


def _worst(fold_shift: object, reading: object) -> str:
    text = fmt.fold(fold_shift, missing="")
    if not text:
        return "–"
    return f"{text} ({reading})" if isinstance(reading, str) and reading else text


def _potency(readout: object, value: object) -> str:
    text = fmt.conc(value, missing="")
    if not text:
        return "–"
    return f"{readout} {text}" if isinstance(readout, str) and readout else text


ATTENTION_ROWS = 12


def attention_lines(df: pd.DataFrame, limit: int = ATTENTION_ROWS) -> list[str]:
    """One whole line per high- or moderate-risk compound, worst first: what it needs, with its numbers."""
    flagged = df[df["grade_key"].isin(["high", "moderate"])].head(limit)
    lines = []
    for r in flagged.itertuples(index=False):
        prompt = " ".join(str(r.top_prompt).split()) if isinstance(r.top_prompt, str) else widgets.rule_title(r.top_rule)
        facts = [f"RT {fmt.duration(r.residence_time_s)}" if r.residence_time_s == r.residence_time_s else "RT unmeasured"]
        worst = _worst(r.worst_fold_shift, r.worst_reading)
        if worst != "–":
            facts.append(f"worst fold {worst}")
        pot = _potency(r.best_readout, r.best_potency_M)
        if pot != "–":
            facts.append(f"best {pot}")
        lines.append(f"**{widgets.md(r.compound)}** · {theme.grade_label(r.grade_key)} · "
                     f"{widgets.md(', '.join(facts))}: {widgets.md(prompt)}")
    return lines


def needs_attention(df: pd.DataFrame) -> None:
    lines = attention_lines(df)
    if not lines:
        return
    n_flagged = int(df["grade_key"].isin(["high", "moderate"]).sum())
    more = f" (the first {len(lines)} of {n_flagged})" if n_flagged > len(lines) else ""
    with st.container(border=True):
        st.markdown(f"**What the flagged compounds need{more}**")
        st.markdown("\n".join(f"- {line}" for line in lines))


def grade_cell_style(label: object) -> str:
    """CSS for a grade cell: the grade's colour as background (same palette everywhere)."""
    g = theme.style_for_label(label)
    if g is theme.UNGRADED:
        return f"color: {g.colour}"
    return f"background-color: {g.colour}; color: white; font-weight: 600"


def styled(df: pd.DataFrame):
    """The display frame with coloured grade cells (a page of at most PAGE_SIZE rows)."""
    return df.style.map(grade_cell_style, subset=["Grade"])


COLUMN_CONFIG = {
    "Compound": st.column_config.TextColumn(width=85, pinned=True),
    "Grade": st.column_config.TextColumn(width=120),
    "Stage": st.column_config.TextColumn(width=125),
    "What it needs": st.column_config.TextColumn(width=310, help="The top finding's decision prompt; the compound "
                                                 "page has every finding with its numbers"),
    "RT": st.column_config.TextColumn(width=65, help="Residence time 1/koff as the grader uses it (runs combined; "
                                      "conflicting runs: the longest)"),
    "Worst fold": st.column_config.TextColumn(width=135, help="Apparent / true affinity predicted for the reading "
                                              "farthest from 1 (either way), and which reading it is; the grader's number"),
    "Best potency": st.column_config.TextColumn(width=100, help="Tightest potency value on record, as measured"),
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

    actions.owner_summary(ctx)

    needs_attention(df)

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
