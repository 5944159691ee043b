"""Compound evidence: findings, potency against predictions, fits, incubation and engagement charts."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from tracker import fmt
from tracker.errors import KrtError
from tracker.ui import actions, data, evidence, widgets
from tracker.ui.main import COMPOUND_KEY, context, page

POTENCY_COLUMNS = {
    "assay": st.column_config.TextColumn("Assay"),
    "readout": st.column_config.TextColumn("Readout", width="small"),
    "value_nM": st.column_config.TextColumn("Measured"),
    "incubation_h": st.column_config.TextColumn("Incubation"),
    "predicted_nM": st.column_config.TextColumn("Predicted apparent",
                                                help="What this assay should read after its incubation, given the measured kinetics"),
    "equilibrium_nM": st.column_config.TextColumn("Projected true",
                                                  help="The measured value corrected to equilibrium with the measured residence time"),
    "fold": st.column_config.TextColumn("Fold shift", help="Predicted apparent / true affinity at this incubation (below 1: reads too potent)"),
    "fold_ci": st.column_config.TextColumn("Fold 95% interval", help="From the 95% interval of the residence time"),
    "min_incubation_h": st.column_config.TextColumn("Reads true after",
                                                    help="Shortest incubation that reads within the fold tolerance, in this format"),
    "model": st.column_config.TextColumn("Model", width="small"),
}


def potency_display(table: pd.DataFrame) -> pd.DataFrame:
    """The potency table as text in the one format (tracker.fmt): 14.9 pM, 2.5 h, 43×."""
    out = table[list(POTENCY_COLUMNS)].copy()
    for col in ("value_nM", "predicted_nM", "equilibrium_nM"):
        out[col] = [widgets.conc(v * 1e-9) for v in table[col]]
    out["incubation_h"] = [widgets.dur(v * 3600.0) for v in table["incubation_h"]]
    out["fold"] = [widgets.fold(v) for v in table["fold"]]
    out["min_incubation_h"] = [widgets.dur(v * 3600.0) for v in table["min_incubation_h"]]
    return out


def worst_compound(ctx, names: list[str]) -> str | None:
    """The worst-graded compound among ``names`` (ties: more findings first, then the name)."""
    table = data.grade_table(data.grades(ctx.url, ctx.version, ctx.program))
    if table.empty:
        return None
    table = table[table["compound"].isin(names)]
    if table.empty:
        return None
    rank = {g: i for i, g in enumerate(("high", "moderate", "low", "clear"))}
    best = min(table.itertuples(index=False), key=lambda r: (rank.get(r.grade, 9), -int(r.n_findings), r.compound))
    return str(best.compound)


def pick_compound(ctx, key: str = COMPOUND_KEY) -> str | None:
    """A compound picker shared by the evidence, gate and what-if pages (remembers the choice)."""
    names = data.compound_names(ctx.url, ctx.version, ctx.program)
    if not names:
        st.info("No compounds yet: load data on the Load data page (or run `krt demo load`).")
        return None
    linked = st.query_params.get("compound")
    if linked in names and st.session_state.get("_krt_linked") != linked:  # a deep link (?compound=NAME) wins once
        st.session_state["_krt_linked"] = linked
        st.session_state[COMPOUND_KEY] = linked
        st.session_state.pop(f"pick_{key}", None)
    current = st.session_state.get(COMPOUND_KEY)
    if current not in names:  # nothing selected yet: open on the compound that most needs a look
        current = worst_compound(ctx, names)
    index = names.index(current) if current in names else 0
    name = st.selectbox("Compound", names, index=index, key=f"pick_{key}")
    st.session_state[COMPOUND_KEY] = name
    return name


def kinetics_frame(kin: pd.DataFrame) -> pd.DataFrame:
    if kin.empty:
        return kin
    return pd.DataFrame({
        "Method": kin["method"],
        "kon": [fmt.rate2(v, missing="–") for v in kin["kon_per_M_s"]],
        "koff": [fmt.rate1(v, missing="–") for v in kin["koff_per_s"]],
        "Residence time": [widgets.dur(v) for v in kin["residence_time_s"]],
        "KD": [widgets.conc(v) for v in kin["kd_from_rates_M"].fillna(kin["kd_M"])],
        "koff 95% CI": [_ci(lo, hi) for lo, hi in zip(kin["koff_low_per_s"], kin["koff_high_per_s"])],
        "Date": kin["measured_on"].dt.date if "measured_on" in kin else None,
        "Source": kin["source"],
        "Status": _status(kin),
    })


def _status(kin: pd.DataFrame) -> list[str]:
    """'current', or which measurement superseded the row and why (superseded values are kept, not graded)."""
    if "superseded_by_id" not in kin:
        return ["current"] * len(kin)
    reasons = kin["superseded_reason"] if "superseded_reason" in kin else pd.Series([None] * len(kin), index=kin.index)
    return ["current" if pd.isna(by) else f"superseded by #{int(by)}" + (f": {why}" if isinstance(why, str) and why else "")
            for by, why in zip(kin["superseded_by_id"], reasons)]


def _ci(lo, hi) -> str:
    if pd.isna(lo) and pd.isna(hi):
        return "–"
    return f"{fmt.rate1(lo, missing='0')} – {fmt.rate1(hi, missing='∞')}"


def render() -> None:
    ctx = context()
    st.title("Compound evidence")
    name = pick_compound(ctx)
    if name is None:
        return
    try:
        info = data.compound(ctx.url, ctx.version, name)
    except KrtError as exc:
        st.error(widgets.md(widgets.one_line(exc)))
        return
    graded = data.findings_of(data.grades(ctx.url, ctx.version, ctx.program), name) or {}
    comp, program = info["compound"], info["program"]

    head = st.columns([3, 2])
    with head[0]:
        st.subheader(widgets.md(name))
        st.caption(f"{widgets.md(comp['program'])} · series {widgets.md(comp.get('series') or '–')} · stage **{comp['stage']}** · "
                   f"intended profile {widgets.md(program.get('intended_profile') or '–')}")
        widgets.structure(comp.get("smiles"))
    with head[1]:
        widgets.badge(graded.get("grade"))
        st.page_link(page("stage-gate"), label="Review a stage transition", icon=":material/how_to_reg:")
        st.page_link(page("what-if"), label="Explore in what-if", icon=":material/tune:")

    st.subheader("Findings")
    widgets.findings_list(graded.get("findings") or [])
    actions.compound_actions(ctx, name, graded.get("findings") or [])

    result = data.grading(ctx.url, ctx.version, ctx.program)
    ev = evidence.of(result, name)
    worst = ev.summary.get("worst_reading")
    if isinstance(worst, str):
        st.markdown(f"**Worst reading:** {widgets.md(worst)}, predicted to read {widgets.fold(ev.summary.get('worst_fold_shift'))} "
                    f"its true value.")
    st.subheader("Potency and what the kinetics predict")
    st.caption(evidence.kinetics_caption(ev))
    table = evidence.potency_table(ev)
    if table.empty:
        st.info("No potency values on record.")
    else:
        st.dataframe(potency_display(table), column_config=POTENCY_COLUMNS, hide_index=True, placeholder="–", width="stretch")

    if not info["kinetics"].empty:
        st.markdown("**Kinetic measurements**")
        if ev.kinetics and int(ev.kinetics.get("n_runs") or 1) > 1:
            st.caption(f"{int(ev.kinetics['n_runs'])} runs: {ev.kinetics.get('kinetics_basis')}.")
        st.dataframe(kinetics_frame(info["kinetics"]), hide_index=True, placeholder="–", width="stretch")

    st.subheader("Apparent affinity against incubation time")
    st.caption("The curve is what an assay would report after each incubation if the compound has the measured kinetics; "
               "diamonds are this compound's own assays. Read potency only to the right of the 2 × RT line.")
    if table.empty and not ev.koff:
        st.info("Nothing to plot: no potency values and no kinetics.")
    else:
        st.altair_chart(evidence.affinity_chart(ev), width="stretch")

    st.subheader("Stored fits")
    fits = evidence.fit_charts(info["fits"])
    if not fits:
        st.info("No raw time courses have been fitted and saved for this compound (`krt fit ... --save`).")
    for title, chart, summary in fits:
        st.markdown(f"**{widgets.md(title)}**")
        if chart is None:
            continue
        cols = st.columns([3, 1])
        cols[0].altair_chart(chart, width="stretch")
        with cols[1]:
            for k, v in summary.items():
                st.markdown(f"**{widgets.md(k)}:** {widgets.md(v)}")

    st.subheader("Target engagement under PK")
    _engagement(info, result, ev, program)


def _engagement(info: dict, result, ev: evidence.CompoundEvidence, program: dict) -> None:
    if info["pk"].empty:
        st.info("No PK profile on record: engagement under PK cannot be simulated.")
        return
    if not ev.koff:
        st.info("No residence time (koff) measured: engagement cannot be simulated with binding kinetics.")
        return
    try:
        eng = evidence.engagement(result, ev.compound_id)  # the PK row, regimen and numbers the duration check judged
    except KrtError as exc:
        st.error(widgets.md(widgets.one_line(exc)))
        return
    if eng is None:
        st.info("Engagement needs kon (or KD) and a complete PK profile (free Cmax, half-life, tmax for oral dosing).")
        return
    m = eng["metrics"]
    steady = eng["dosing_interval"] is not None
    st.markdown(f"**Regimen judged:** {evidence.engagement_regimen(eng)}")
    st.altair_chart(evidence.engagement_chart(eng, program), width="stretch")
    cols = st.columns(5 if steady else 4)
    cols[0].metric("Onset (threshold reached)", widgets.dur(m["onset_s"]))
    cols[1].metric("Offset (after the last dose)" if steady else "Offset (last time above)", widgets.dur(m["offset_s"]))
    cols[2].metric("Time above threshold per interval" if steady else "Time above threshold",
                   widgets.dur(m["duration_above_threshold_s"]))
    cols[3].metric("Peak engagement (steady state)" if steady else "Peak engagement", fmt.pct(m["peak_occupancy"], missing="–"))
    if steady:
        cols[4].metric("Trough (steady state)", fmt.pct(m["trough_occupancy"], missing="–"))
    if eng.get("target_half_life") is not None:
        turnover = f"target turnover with t½ {widgets.dur(eng['target_half_life'])}"
        if eng.get("duration_set_by") == "turnover":
            turnover += " (turnover, not dissociation, sets the duration)"
    else:
        turnover = "no target turnover (the program gives no target half-life)"
    st.caption(f"Kinetics: {ev.source}. Free drug, one binding site, {turnover}. The same kinetics, PK, regimen and numbers "
               "as the duration-mismatch rule. Simulations are decision support, not dosing advice.")


if __name__ == "__main__":
    render()
