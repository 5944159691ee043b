"""Kinetic map: kon against koff for every compound with measured rates, coloured by grade."""

from __future__ import annotations


import pandas as pd
import streamlit as st

from tracker import fmt
from tracker.ui import charts, data, theme, widgets
from tracker.ui.main import context

MAX_POINTS = 4000
INCUBATIONS_S = (600.0, 1800.0, 3600.0, 2 * 3600.0, 4 * 3600.0, 16 * 3600.0, 24 * 3600.0)


def map_points(kin: pd.DataFrame, graded: pd.DataFrame) -> pd.DataFrame:
    """Display frame for :func:`tracker.ui.charts.kinetic_map_chart` (kon /M/s, koff /s, grade labels)."""
    df = kin.merge(graded[["compound", "grade"]], on="compound", how="left")
    return pd.DataFrame({
        "compound": df["compound"],
        "series": df["series"].fillna("no series"),
        "stage": df["stage"],
        "grade_label": df["grade"].map(theme.grade_label),
        "kon": df["kon_per_M_s"].astype(float),
        "koff": df["koff_per_s"].astype(float),
        "rt_text": [widgets.dur(v) for v in df["residence_time_s"]],
        "kd_nM": df["kd_M"].astype(float) / 1e-9,
    })


def series_floor(points: pd.DataFrame, series: str, incubation_s: float) -> tuple[float | None, float | None, int]:
    """``(floor KD in M, median kon, n)`` for a series (the evidence model's floor, :func:`tracker.rules.evidence.floor_of_series`)."""
    from tracker.rules.evidence import floor_of_series

    return floor_of_series(points.loc[points["series"] == series, "kon"].to_numpy(float), incubation_s)


def render() -> None:
    ctx = context()
    st.title("Kinetic map")
    st.caption("Each point is a compound's kon and koff as the grader uses them (replicate runs combined). Diagonals join equal affinity (KD = koff/kon); "
               "vertical dotted lines join equal residence time (RT = 1/koff). Left is slower dissociation.")
    kin = data.kinetic_points(ctx.url, ctx.version, ctx.program)
    if kin.empty:
        st.info("No compound in this selection has both kon and koff measured.")
        return
    graded = data.grade_table(data.grades(ctx.url, ctx.version, ctx.program))
    pts = map_points(kin, graded)
    if len(pts) > MAX_POINTS:  # keep the chart below the charting library's row limit: the worst grades first
        rank = pts["grade_label"].map({label: i for i, label in enumerate(theme.GRADE_LABELS)})
        shown = pts.assign(_r=rank).sort_values(["_r", "compound"]).head(MAX_POINTS).drop(columns="_r")
        st.caption(f"Showing the {MAX_POINTS:,} worst-graded of {len(pts):,} compounds with measured kinetics; "
                   "pick a program in the sidebar to see all of its compounds.")
        pts = shown
    series = sorted(pts["series"].unique())
    c1, c2, c3 = st.columns([3, 3, 2])
    chosen = c1.selectbox("Series for the assay floor", series, key="km_series")
    inc = c2.select_slider("Incubation time", options=list(INCUBATIONS_S), value=3600.0, format_func=widgets.dur, key="km_inc")
    names_on = c3.toggle("Show compound names", value=len(pts) <= 40, key="km_labels",
                         help="Names beside each point; hovering a point always shows its name")
    floor, kon, n = series_floor(pts, chosen, inc)
    label = ""
    if floor is not None:
        label = f"assay floor of {chosen} at {widgets.dur(inc)}: {widgets.conc(floor)}"
        st.markdown(f"**Assay floor of {widgets.md(chosen)} at {widgets.dur(inc)}: {widgets.conc(floor)}** (ln2 / (kon · t) with the series' median kon {fmt.rate2(kon)} from {n} compound(s)). "
                    "Compounds below the dashed line are tighter than this assay can report: they will bunch at the floor.")
    st.altair_chart(charts.kinetic_map_chart(pts, floor_kd_M=floor, floor_label=label, incubation_s=inc, labels=names_on), width="stretch")
    below = pts[(pts["series"] == chosen) & (pts["kd_nM"] * 1e-9 < (floor or 0))]
    if floor is not None and not below.empty:
        st.warning(f"{len(below)} compound(s) of {widgets.md(chosen)} have a true KD below the floor: "
                   + widgets.md(", ".join(below["compound"])) + ". Their potency at this incubation is underestimated.")
    with st.expander("Points as a table"):
        table = pts.assign(kon=[fmt.rate2(v) for v in pts["kon"]], koff=[fmt.rate1(v) for v in pts["koff"]],
                           kd_nM=[fmt.conc(v * 1e-9) for v in pts["kd_nM"]])
        st.dataframe(table.rename(columns={"rt_text": "Residence time", "kd_nM": "KD", "grade_label": "Grade"}),
                     hide_index=True, width="stretch")


if __name__ == "__main__":
    render()
