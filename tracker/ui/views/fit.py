"""Fit a time course: upload raw readings (long or plate layout), pick the method and units, see the fit, save it.

Reading, fitting, the overlay numbers and saving all happen in the layers below
(:mod:`tracker.io.timecourse`, :mod:`tracker.services.fits`): this page only
collects choices and shows what they return.  Saving goes through the same
service as ``krt fit --save``, with the same role check and the same 3x
residence-time guard (a supersede reason field unlocks it).
"""

from __future__ import annotations

import hashlib
import re
from typing import Any

import altair as alt
import pandas as pd
import streamlit as st

from tracker.domain import FIT_METHODS
from tracker.errors import KrtError
from tracker.ui import charts, data, evidence, widgets
from tracker.ui.main import context

FROM_HEADER = "from the header"
TIME_UNITS = (FROM_HEADER, "s", "min", "h")
CONC_UNITS = (FROM_HEADER, "M", "mM", "uM", "nM", "pM")
LONG, PLATE = "Long: one row per reading", "Plate: a time column and one column per well"
STATE = "fitpage_result"
_EXAMPLE = re.compile(r"e\.g\. '([^']+)'")
SAVED = "fitpage_saved"


def _header_wells(content: bytes) -> list[str]:
    """Well columns of a plate upload (every header cell but the time column), for the map editor."""
    from tracker.io.timecourse import plate_wells

    try:
        return plate_wells(content)
    except KrtError:
        return []


_MAP_HELP = {"well": "the well's column name in the file (A1, B07 ...)",
             "concentration": "with its unit (10 nM), or a unit in the column name; 0 for tracer alone",
             "curve": "label shared by replicate wells"}


def _map_start(content: bytes, map_file) -> pd.DataFrame:
    """The editor's first rows: an uploaded map as written (read by the import's reading layer), else one row per well."""
    if map_file is not None:
        from tracker.io.reading import read_csv_bytes

        raw = read_csv_bytes(map_file.getvalue(), "well map", map_file.name)
        if not raw.errors:
            return pd.DataFrame({raw.original(c): raw.cells[c].fillna("").astype(str) for c in raw.cells.columns})
        st.error(widgets.one_line(raw.errors[0]))
    wells = _header_wells(content)
    return pd.DataFrame({"well": wells, "concentration": [""] * len(wells), "curve": [""] * len(wells)})


def _options_inputs(method: str) -> dict[str, Any]:
    from tracker.services.fitoptions import FIT_OPTIONS, WEIGHTS

    given: dict[str, Any] = {}
    given["weights"] = st.selectbox("Weights", list(WEIGHTS), key="fit_weights",
                                    help="; ".join(f"**{k}**: {v}" for k, v in WEIGHTS.items()))
    extra = [(dest, spec) for dest, spec in FIT_OPTIONS.items() if dest != "weights" and method in spec[1]]
    if extra:
        cols = st.columns(2)
        for i, (dest, (_kind, _methods, text)) in enumerate(extra):
            example = _EXAMPLE.search(text)
            given[dest] = cols[i % 2].text_input(dest.replace("_", " ").capitalize(), key=f"fit_opt_{dest}", help=text,
                                                 placeholder=example.group(1) if example else "")
    return given


def _label(dest: str) -> str:
    return f"'{dest.replace('_', ' ').capitalize()}'"


def run_fit(method: str, upload: tuple[str, bytes], time_unit: str | None, conc_unit: str | None,
            well_map: pd.DataFrame | None, given: dict[str, Any]) -> dict[str, Any]:
    """Read and fit through the services; ``{"ok", "error", "result", "frame", "overlay"}``, never raises for bad input."""
    from tracker.io.timecourse import read_time_course
    from tracker.services.fitoptions import fit_options
    from tracker.services.fits import fit_overlay, fit_time_course

    try:
        opts = fit_options(method, given, name=_label)
        df = read_time_course(upload, method, time_unit=time_unit, conc_unit=conc_unit, well_map=well_map,
                              control_label=opts.get("control_label"))
        result = fit_time_course(method, df, source=upload[0], **opts)
        overlay = fit_overlay(result, df)
    except KrtError as exc:
        return {"ok": False, "error": widgets.one_line(exc)}
    return {"ok": True, "error": None, "result": result, "frame": df, "overlay": overlay, "options": given,
            "source": upload[0]}


def _display(overlay: dict[str, Any]) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, str, str]:
    """Overlay frames of the service in display units (minutes/hours or nM): scaling only, no kinetics."""
    points, curves, kind = overlay["points"], overlay["curves"], overlay["x_kind"]
    if kind == "conc":
        scale, title = 1e-9, "Concentration (nM, log scale)"
    else:
        t_max = float(points["x"].max()) if len(points) else 0.0
        scale, title = (60.0, "Time (min)") if t_max <= 3 * 3600 else (3600.0, "Time (h)")
    p = points.assign(x=points["x"] / scale)
    c = curves.assign(x=curves["x"] / scale)
    if kind == "conc":
        p, c = p[p["x"] > 0], c[c["x"] > 0]
    return p[["x", "y", "curve"]], c, p[["x", "residual", "curve"]], title, kind


def residual_chart(res: pd.DataFrame, x_title: str, x_kind: str, labels: list[str]) -> alt.Chart:
    xscale = alt.Scale(type="log") if x_kind == "conc" else alt.Scale(zero=False)
    zero = alt.Chart(pd.DataFrame({"y": [0.0]})).mark_rule(color="#888", strokeDash=[4, 3]).encode(y="y:Q")
    dots = alt.Chart(res).mark_circle(size=30, opacity=0.85).encode(
        x=alt.X("x:Q", scale=xscale, title=x_title), y=alt.Y("residual:Q", title="Residual (measured − fitted)"),
        color=alt.Color("curve:N", title="Curve", legend=None,  # the same colour per curve as the fit above
                        scale=alt.Scale(domain=labels, range=(list(charts.CURVE_PALETTE) * (len(labels) // len(charts.CURVE_PALETTE) + 1))[: max(1, len(labels))])),
        tooltip=[alt.Tooltip("curve:N", title="Curve"), alt.Tooltip("x:Q", title=x_title, format=".3g"),
                 alt.Tooltip("residual:Q", title="Residual", format=".4g")])
    return alt.layer(zero, dots).properties(height=160)


def render() -> None:
    ctx = context()
    st.title("Fit a time course")
    st.caption("Upload raw readings, choose the method and units, check the fit, then save it as evidence for a compound. "
               "Files follow the import rules: comma-separated UTF-8 CSV (or a one-sheet .xlsx), units in the headers "
               "(`time (min)`, `concentration (nM)`) or chosen below — nothing is assumed.")
    widgets.safety_box()
    upload = st.file_uploader("Time course file", type=["csv", "xlsx"], key="fit_file")
    c1, c2, c3 = st.columns(3)
    method = c1.selectbox("Method", list(FIT_METHODS), key="fit_method")
    tu = c2.selectbox("Time unit", TIME_UNITS, key="fit_time_unit", help="Used for columns whose header names no unit")
    cu = c3.selectbox("Concentration unit", CONC_UNITS, key="fit_conc_unit", help="Used for columns whose header names no unit")
    layout = st.radio("Layout", (LONG, PLATE), key="fit_layout", horizontal=True)
    given = _options_inputs(method)
    if upload is None:
        st.info("Upload a time course to fit it. Long layout columns: time, signal, and as the method needs them "
                "concentration, curve, replicate, incubation.")
        return
    content = upload.getvalue()
    well_map = None
    if layout == PLATE:
        st.markdown("**Well map**: the concentration (with its unit, e.g. `10 nM`) and curve of each well. Wells that "
                    "share a curve are replicates, fitted jointly.")
        map_file = st.file_uploader("Well map CSV (optional: fills the editor; columns well, concentration, curve)",
                                    type=["csv"], key="fit_map_file")
        start = _map_start(content, map_file)
        digest = hashlib.sha1(content + (map_file.getvalue() if map_file else b"")).hexdigest()[:8]
        well_map = st.data_editor(start, key=f"fit_wellmap_{digest}", num_rows="dynamic", hide_index=True, width="stretch",
                                  column_config={c: st.column_config.TextColumn(c, help=_MAP_HELP.get(c.split(" ")[0], ""))
                                                 for c in start.columns})
    key = (hashlib.sha256(content).hexdigest(), upload.name, method, tu, cu, layout,
           None if well_map is None else well_map.to_json(), tuple(sorted((k, str(v)) for k, v in given.items())))
    if st.session_state.get(STATE, {}).get("key") != key:
        st.session_state[STATE] = {"key": key, **run_fit(method, (upload.name, content),
                                                         None if tu == FROM_HEADER else tu, None if cu == FROM_HEADER else cu,
                                                         well_map, given)}
        st.session_state.pop(SAVED, None)
    fit = st.session_state[STATE]
    if not fit["ok"]:
        st.error(widgets.md(fit["error"]))
        return
    _show(fit)
    _save_box(ctx, fit)


def _show(fit: dict[str, Any]) -> None:
    res = fit["result"]
    summary = evidence.fit_summary(res)
    st.subheader(f"{res.method} fit of {widgets.md(fit['source'])}")
    if summary:
        st.markdown("  \n".join(f"**{k}**: {v}" for k, v in summary.items()))
    st.caption(f"Weights: {fit['overlay']['weights']} · intervals: {res.ci_kind} · R² {res.r_squared:.4f} · "
               f"{res.n_points} points, {res.n_params} parameters")
    for code, message in res.warnings:
        st.warning(f"{message} [{code}]")
    points, curves, resid, x_title, x_kind = _display(fit["overlay"])
    st.altair_chart(charts.fit_chart(points, curves, x_title, x_kind), width="stretch")
    labels = list(dict.fromkeys(list(curves["curve"]) + list(points["curve"])))
    st.altair_chart(residual_chart(resid, x_title, x_kind, labels), width="stretch")


def _save_box(ctx, fit: dict[str, Any]) -> None:
    from tracker.services.fits import describe_saved, save_fit

    st.subheader("Save to a compound")
    ident = ctx.identity
    if not (ident and ident.can_write):
        st.info("Viewers can fit but not save. Ask a scientist or lead.")
        return
    names = data.compound_names(ctx.url, ctx.version, ctx.program)
    if not names:
        st.info("No compounds in this program yet: import them on the Load data page first.")
        return
    compound = st.selectbox("Compound", names, key="fit_save_compound")
    reason = st.text_input("Supersede reason (only when replacing a stored residence time more than 3x different)",
                           key="fit_supersede")
    if st.button("Save fit", type="primary", key="fit_save"):
        df = fit["frame"]
        try:
            saved = save_fit(compound, fit["result"], df, fit["source"], engine=ctx.engine, actor=ident.name,
                             units=df.attrs.get("units", {}), options={k: v for k, v in fit["options"].items() if v},
                             supersede=reason or None)
        except KrtError as exc:
            st.session_state[SAVED] = ("error", widgets.one_line(exc))
        else:
            data.clear_caches()
            st.session_state[SAVED] = ("ok", describe_saved(saved).strip())
    outcome = st.session_state.get(SAVED)
    if outcome:
        (st.success if outcome[0] == "ok" else st.error)(widgets.md(outcome[1]))


if __name__ == "__main__":
    render()
