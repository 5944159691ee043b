"""Chart builders: small typed functions, DataFrames in display units in, ``alt.Chart`` out.

Every chart has explicit encodings, tooltips, and its unit in each axis title.
Inputs are already in display units (nM, h, %, /s, /M/s); the ``*_frame``
helpers here build those frames from SI arrays so pages and the review pack
share one conversion.  Log axes drop zeros and negatives silently, so every
builder that uses one filters to positive values first and says so in its
docstring.  Frames stay well below Altair's 5,000-row limit (curves are
sampled at a few hundred points).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import altair as alt
import numpy as np
import pandas as pd

from ..domain import STAGES
from . import theme

NM = 1e-9
H = 3600.0
CURVE_PALETTE = ("#3C6E71", "#B5432A", "#4F7CA8", "#C99A2E", "#7A5C99", "#5E8C61", "#8C6D46", "#A03C78")


#: What the chart builders return: a single chart, a layer of charts or a faceted chart.
ChartLike = alt.Chart | alt.LayerChart | alt.FacetChart


def _base(chart: ChartLike, height: int = 320, legend: str = "right") -> ChartLike:
    return chart.properties(height=height).configure_axis(
        labelFont=theme.FONT, titleFont=theme.FONT, labelColor=theme.INK, titleColor=theme.INK, gridColor="#ECECEC",
    ).configure_legend(labelFont=theme.FONT, titleFont=theme.FONT, orient=legend, labelLimit=320).configure_view(strokeWidth=0)


def grade_colour_scale() -> alt.Scale:
    return alt.Scale(domain=list(theme.GRADE_LABELS), range=list(theme.GRADE_COLOURS))


# ------------------------------------------------------------------ portfolio
def grade_counts_chart(df: pd.DataFrame) -> ChartLike:
    """Stacked counts of grades by stage, one panel per program.

    ``df`` columns: ``program``, ``stage``, ``grade_label``, ``n``.
    """
    # Every stage is a category on the axis, in pipeline order, each labelled (never thinned out), so the
    # panels line up; counts take whole-number ticks.
    bars = alt.Chart(df).mark_bar(cornerRadiusTopLeft=2, cornerRadiusTopRight=2).encode(
        x=alt.X("stage:N", title="Stage", scale=alt.Scale(domain=list(STAGES)),
                axis=alt.Axis(labelAngle=-40, labelOverlap=False, labelLimit=160, labelFontSize=11)),
        y=alt.Y("sum(n):Q", title="Compounds (count)", stack="zero", axis=alt.Axis(tickMinStep=1, format="d")),
        color=alt.Color("grade_label:N", scale=grade_colour_scale(), title="Grade",
                        sort=list(theme.GRADE_LABELS)),
        order=alt.Order("grade_order:Q", sort="ascending"),
        tooltip=[alt.Tooltip("program:N", title="Program"), alt.Tooltip("stage:N", title="Stage"),
                 alt.Tooltip("grade_label:N", title="Grade"), alt.Tooltip("sum(n):Q", title="Compounds")],
    ).transform_calculate(
        grade_order=f"indexof({list(theme.GRADE_LABELS)!r}, datum.grade_label)"
    ).properties(width=30 * len(STAGES), height=220)
    chart = bars.facet(facet=alt.Facet("program:N", title=None, header=alt.Header(labelFont=theme.FONT, labelFontWeight="bold",
                                                                                  labelFontSize=13)), columns=3)
    return chart.configure_axis(labelFont=theme.FONT, titleFont=theme.FONT, gridColor="#ECECEC").configure_view(strokeWidth=0) \
        .configure_legend(labelFont=theme.FONT, titleFont=theme.FONT, orient="bottom")


def grade_counts_frame(portfolio: pd.DataFrame) -> pd.DataFrame:
    """Counts by program, stage and grade label (input: merged portfolio rows)."""
    if portfolio.empty:
        return pd.DataFrame(columns=["program", "stage", "grade_label", "n"])
    return portfolio.groupby(["program", "stage", "grade_label"], as_index=False).size().rename(columns={"size": "n"})


# ------------------------------------------------------------------ fits
def fit_frames(fit: dict, data: pd.DataFrame, n: int = 200) -> tuple[pd.DataFrame, pd.DataFrame, str, str]:
    """Points and model frames for one stored fit, in display units.

    Returns ``(points, model, x_title, x_kind)``; ``points``: ``x, y, curve``;
    ``model``: ``x, y, lo, hi, curve``.  ``x_kind`` is ``"time"`` (minutes or
    hours, linear axis) or ``"conc"`` (nM, log axis: points at zero
    concentration are left out of that chart).
    """
    from ..kinetics.fitting import FitResult

    result = FitResult.from_dict(fit)
    model = result.model
    is_conc = "time_s" not in data.columns or result.method in ("ki-shift", "insurmountability")
    if is_conc:
        x_si = data["concentration_M"].to_numpy(float)
        scale, x_title, x_kind = NM, "Concentration (nM, log scale)", "conc"
    else:
        x_si = data["time_s"].to_numpy(float)
        t_max = float(np.nanmax(x_si)) if x_si.size else 0.0
        scale, x_title = (60.0, "Time (min)") if t_max <= 3 * H else (H, "Time (h)")
        x_kind = "time"
    labels = list(model.labels) if model else []
    point_curve = _assign_curves(data, model, labels)
    points = pd.DataFrame({"x": x_si / scale, "y": data["signal"].to_numpy(float), "curve": point_curve})
    frames = []
    if model is not None:
        for i, label in enumerate(labels):
            lo_x, hi_x = model.x_range.get(label, (float(np.nanmin(x_si)), float(np.nanmax(x_si))))
            if is_conc:
                lo_x = max(lo_x, float(np.nanmin(x_si[x_si > 0])) if np.any(x_si > 0) else 1e-12)
                xs = np.geomspace(lo_x, max(hi_x, lo_x * 10), n)
            else:
                xs = np.linspace(min(lo_x, 0.0), hi_x, n)
            y = model.predict(xs, label)
            lo, hi = model.band(xs, label)
            frames.append(pd.DataFrame({"x": xs / scale, "y": y, "lo": lo, "hi": hi, "curve": label}))
    curves = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["x", "y", "lo", "hi", "curve"])
    if is_conc:
        points = points[points["x"] > 0]
    return points, curves, x_title, x_kind


def _assign_curves(data: pd.DataFrame, model, labels: list[str]) -> list[str]:
    """The model curve each data point belongs to: by label, else by concentration, else the only curve."""
    n = len(data)
    if not labels:
        return ["data"] * n
    if len(labels) == 1:
        return [labels[0]] * n
    if "curve" in data.columns:
        raw = data["curve"].astype(object).where(data["curve"].notna(), None).tolist()
        if all(r in labels for r in raw):
            return raw
    if "concentration_M" in data.columns:
        concs = np.array([c.conc for c in model.curves], float)
        out = []
        for c in data["concentration_M"].to_numpy(float):
            j = int(np.nanargmin(np.abs(concs - c))) if np.any(np.isfinite(concs)) else 0
            out.append(labels[j])
        return out
    return [labels[0]] * n


def fit_chart(points: pd.DataFrame, curves: pd.DataFrame, x_title: str, x_kind: str, y_title: str = "Signal (assay units)") -> ChartLike:
    """Data points, the fitted curve and its 95% confidence band, one colour per curve."""
    xscale = alt.Scale(type="log") if x_kind == "conc" else alt.Scale(zero=False)
    labels = list(dict.fromkeys(list(curves["curve"]) + list(points["curve"])))
    colour = alt.Color("curve:N", title="Curve", scale=alt.Scale(domain=labels, range=list(CURVE_PALETTE)[: max(1, len(labels))] * (len(labels) // len(CURVE_PALETTE) + 1)))
    band_data = curves.dropna(subset=["lo", "hi"])
    layers = []
    if not band_data.empty:
        layers.append(alt.Chart(band_data).mark_area(opacity=0.18).encode(
            x=alt.X("x:Q", scale=xscale, title=x_title), y=alt.Y("lo:Q", title=y_title), y2="hi:Q", color=colour,
            tooltip=[alt.Tooltip("curve:N", title="Curve"), alt.Tooltip("x:Q", title=x_title, format=".3g"),
                     alt.Tooltip("lo:Q", title="95% band low", format=".4g"), alt.Tooltip("hi:Q", title="95% band high", format=".4g")],
        ))
    layers.append(alt.Chart(curves).mark_line(strokeWidth=2).encode(
        x=alt.X("x:Q", scale=xscale, title=x_title), y=alt.Y("y:Q", title=y_title), color=colour,
        tooltip=[alt.Tooltip("curve:N", title="Curve"), alt.Tooltip("x:Q", title=x_title, format=".3g"),
                 alt.Tooltip("y:Q", title="Fitted", format=".4g")],
    ))
    layers.append(alt.Chart(points).mark_circle(size=38, opacity=0.85, stroke="white", strokeWidth=0.5).encode(
        x=alt.X("x:Q", scale=xscale, title=x_title), y=alt.Y("y:Q", title=y_title), color=colour,
        tooltip=[alt.Tooltip("curve:N", title="Curve"), alt.Tooltip("x:Q", title=x_title, format=".3g"),
                 alt.Tooltip("y:Q", title="Measured", format=".4g")],
    ))
    return _base(alt.layer(*layers), height=300, legend="bottom")


# ------------------------------------------------------------------ apparent affinity vs incubation
def incubation_grid(koff: float, incubations_s: Sequence[float] = ()) -> np.ndarray:
    """Log-spaced incubation times (s) spanning 1 min .. well past 2 x RT and the compound's own incubations."""
    rt = 1.0 / koff
    lo = min([60.0, 0.05 * rt] + [0.5 * t for t in incubations_s if t > 0])
    hi = max([48 * H, 6 * rt] + [2 * t for t in incubations_s if t > 0])
    return np.geomspace(lo, hi, 160)


def apparent_affinity_frame(kd_M: float, koff: float, t_s: np.ndarray, reading: dict | None = None) -> pd.DataFrame:
    """Predicted apparent affinity (nM) against incubation (h): the evidence model's curve in display units.

    ``reading``: a potency row whose format, tracer and pre-incubation set the
    model (:func:`tracker.rules.evidence.affinity_curve`); None = one-step read.
    """
    from ..rules.evidence import affinity_curve

    c = affinity_curve(kd_M, koff, t_s, reading)
    return pd.DataFrame({"incubation_h": c["incubation_s"].to_numpy() / H, "apparent_nM": c["apparent_M"].to_numpy() / NM,
                         "fold": c["fold"].to_numpy(), "model": c["model"].to_numpy()})


def apparent_affinity_chart(curve: pd.DataFrame, measured: pd.DataFrame, *, rt_h: float | None, kd_nM: float | None,
                            model_label: str = "predicted (saturation model)") -> ChartLike:
    """Apparent affinity against incubation on log-log axes.

    ``curve``: ``incubation_h, apparent_nM, fold`` (may be empty when RT is
    unknown); ``measured``: ``incubation_h, value_nM, assay, readout`` (the
    compound's own assays, marked as points and as vertical ticks).  Rules:
    2 x RT (vertical) and the true affinity (horizontal).  Non-positive
    values are dropped (log axes).
    """
    x_title = "Incubation time (h, log scale)"
    y_title = "Apparent affinity (nM, log scale)"
    xs = alt.Scale(type="log")
    ys = alt.Scale(type="log")
    layers = []
    curve = curve[(curve["incubation_h"] > 0) & (curve["apparent_nM"] > 0)] if not curve.empty else curve
    measured = measured[(measured["incubation_h"] > 0) & (measured["value_nM"] > 0)] if not measured.empty else measured
    if not curve.empty:
        layers.append(alt.Chart(curve.assign(series=model_label)).mark_line(strokeWidth=2.5, color=theme.MODEL).encode(
            x=alt.X("incubation_h:Q", scale=xs, title=x_title), y=alt.Y("apparent_nM:Q", scale=ys, title=y_title),
            tooltip=[alt.Tooltip("incubation_h:Q", title="Incubation (h)", format=".3g"),
                     alt.Tooltip("apparent_nM:Q", title="Apparent (nM)", format=".3g"),
                     alt.Tooltip("fold:Q", title="Fold shift", format=".2f"), alt.Tooltip("series:N", title="Curve")],
        ))
    if not measured.empty:
        layers.append(alt.Chart(measured).mark_rule(strokeDash=[2, 3], color=theme.GUIDE).encode(
            x=alt.X("incubation_h:Q", scale=xs, title=x_title),
            tooltip=[alt.Tooltip("assay:N", title="Assay"), alt.Tooltip("incubation_h:Q", title="Incubation (h)", format=".3g")],
        ))
        layers.append(alt.Chart(measured).mark_point(size=90, filled=True, shape="diamond", color=theme.MEASURED).encode(
            x=alt.X("incubation_h:Q", scale=xs, title=x_title), y=alt.Y("value_nM:Q", scale=ys, title=y_title),
            tooltip=[alt.Tooltip("assay:N", title="Assay"), alt.Tooltip("readout:N", title="Readout"),
                     alt.Tooltip("value_nM:Q", title="Measured (nM)", format=".3g"),
                     alt.Tooltip("incubation_h:Q", title="Incubation (h)", format=".3g")],
        ))
    if rt_h is not None and math.isfinite(rt_h):
        rule = pd.DataFrame({"incubation_h": [2 * rt_h], "label": [f"2 × RT = {_h_text(2 * rt_h)}"]})
        layers.append(alt.Chart(rule).mark_rule(color=theme.THRESHOLD, strokeWidth=1.5).encode(
            x=alt.X("incubation_h:Q", scale=xs, title=x_title), tooltip=[alt.Tooltip("label:N", title="Rule of thumb")]))
        layers.append(alt.Chart(rule).mark_text(align="left", dx=4, dy=-6, color=theme.THRESHOLD, font=theme.FONT).encode(
            x=alt.X("incubation_h:Q", scale=xs), y=alt.value(10), text="label:N"))
    if kd_nM is not None and math.isfinite(kd_nM) and kd_nM > 0:
        kd_rule = pd.DataFrame({"apparent_nM": [kd_nM], "label": [f"true affinity {kd_nM:.3g} nM"]})
        layers.append(alt.Chart(kd_rule).mark_rule(color=theme.GUIDE, strokeDash=[6, 4]).encode(
            y=alt.Y("apparent_nM:Q", scale=ys, title=y_title), tooltip=[alt.Tooltip("label:N", title="Equilibrium")]))
        layers.append(alt.Chart(kd_rule).mark_text(align="left", baseline="top", dx=4, dy=3, color=theme.GUIDE, font=theme.FONT).encode(
            y=alt.Y("apparent_nM:Q", scale=ys), x=alt.value(0), text="label:N"))
    if not layers:
        layers.append(alt.Chart(pd.DataFrame({"incubation_h": [1.0], "apparent_nM": [1.0]})).mark_point(opacity=0).encode(
            x=alt.X("incubation_h:Q", scale=xs, title=x_title), y=alt.Y("apparent_nM:Q", scale=ys, title=y_title)))
    return _base(alt.layer(*layers), height=320)


def _h_text(h: float) -> str:
    if h < 1:
        return f"{h * 60:.3g} min"
    return f"{h:.3g} h"


# ------------------------------------------------------------------ engagement under PK
def engagement_frame(ts: dict) -> pd.DataFrame:
    """Long frame (``time_h``, ``occupancy_pct``, ``curve``, ``conc_nM``) from :func:`engagement_timeseries` output."""
    t_h = np.asarray(ts["t_s"], float) / H
    conc = np.asarray(ts["conc_M"], float) / NM
    a = pd.DataFrame({"time_h": t_h, "occupancy_pct": 100 * np.asarray(ts["occupancy"], float),
                      "curve": "with binding kinetics", "conc_nM": conc})
    b = pd.DataFrame({"time_h": t_h, "occupancy_pct": 100 * np.asarray(ts["occupancy_rapid"], float),
                      "curve": "rapid equilibrium (PK only)", "conc_nM": conc})
    return pd.concat([a, b], ignore_index=True)


def engagement_chart(frame: pd.DataFrame, *, threshold: float | None, onset_max_h: float | None = None,
                     offset_max_h: float | None = None, duration_min_h: float | None = None) -> ChartLike:
    """Target engagement against time: kinetic and rapid-equilibrium curves, threshold, program windows.

    The onset limit is shaded from 0 to ``onset_max_h`` (engagement should
    reach the threshold inside it); ``offset_max_h`` is a vertical rule
    (engagement should be gone by then); ``duration_min_h`` is written in the
    threshold's tooltip.
    """
    x_title = "Time after first dose (h)"
    y_title = "Target engagement (% occupied)"
    layers = []
    if onset_max_h is not None and math.isfinite(onset_max_h):
        win = pd.DataFrame({"start": [0.0], "end": [onset_max_h], "label": [f"onset limit: threshold within {_h_text(onset_max_h)}"]})
        layers.append(alt.Chart(win).mark_rect(color=theme.WINDOW, opacity=0.7).encode(
            x=alt.X("start:Q", title=x_title), x2="end:Q", tooltip=[alt.Tooltip("label:N", title="Program window")]))
    domain = ["with binding kinetics", "rapid equilibrium (PK only)"]
    layers.append(alt.Chart(frame).mark_line(strokeWidth=2.4).encode(
        x=alt.X("time_h:Q", title=x_title),
        y=alt.Y("occupancy_pct:Q", title=y_title, scale=alt.Scale(domain=[0, 100])),
        color=alt.Color("curve:N", title="Curve", scale=alt.Scale(domain=domain, range=[theme.MODEL, theme.RAPID])),
        strokeDash=alt.StrokeDash("curve:N", title="Curve", scale=alt.Scale(domain=domain, range=[[1, 0], [6, 4]])),
        tooltip=[alt.Tooltip("curve:N", title="Curve"), alt.Tooltip("time_h:Q", title="Time (h)", format=".3g"),
                 alt.Tooltip("occupancy_pct:Q", title="Engagement (%)", format=".1f"),
                 alt.Tooltip("conc_nM:Q", title="Free drug (nM)", format=".3g")],
    ))
    if threshold is not None and math.isfinite(threshold):
        text = f"threshold {threshold * 100:.0f}%"
        if duration_min_h is not None and math.isfinite(duration_min_h):
            text += f", to be held ≥ {_h_text(duration_min_h)}"
        thr = pd.DataFrame({"occupancy_pct": [threshold * 100], "label": [text]})
        layers.append(alt.Chart(thr).mark_rule(color=theme.THRESHOLD, strokeDash=[5, 3], strokeWidth=1.5).encode(
            y=alt.Y("occupancy_pct:Q", title=y_title), tooltip=[alt.Tooltip("label:N", title="Program")]))
        thr["time_h"] = float(frame["time_h"].max()) if not frame.empty else 1.0
        layers.append(alt.Chart(thr).mark_text(align="right", dy=-7, color=theme.THRESHOLD, font=theme.FONT).encode(
            y=alt.Y("occupancy_pct:Q"), x=alt.X("time_h:Q"), text="label:N"))
    if offset_max_h is not None and math.isfinite(offset_max_h):
        off = pd.DataFrame({"time_h": [offset_max_h], "label": [f"offset limit: below threshold by {_h_text(offset_max_h)}"]})
        layers.append(alt.Chart(off).mark_rule(color=theme.FLOOR, strokeWidth=2).encode(
            x=alt.X("time_h:Q", title=x_title), tooltip=[alt.Tooltip("label:N", title="Program window")]))
    return _base(alt.layer(*layers), height=320, legend="bottom")


# ------------------------------------------------------------------ kinetic map
KD_LINES_M = (1e-12, 1e-11, 1e-10, 1e-9, 1e-8, 1e-7, 1e-6)
RT_LINES_S = (60.0, 600.0, H, 10 * H, 100 * H)
RT_LABELS = {60.0: "1 min", 600.0: "10 min", H: "1 h", 10 * H: "10 h", 100 * H: "100 h"}
MAP_HEIGHT = 460


# Legible, distinct outlines for series (grade is colour only; the grade legend shows plain swatches).
SERIES_SHAPES = ("circle", "square", "triangle-up", "diamond", "cross", "triangle-down", "triangle-left",
                 "triangle-right", "wedge", "stroke")


def kinetic_map_chart(points: pd.DataFrame, *, floor_kd_M: float | None = None, floor_label: str = "",
                      incubation_s: float | None = None, labels: bool = False) -> ChartLike:
    """log kon against log koff, with iso-affinity diagonals and iso-residence-time lines.

    ``points``: ``compound, series, stage, grade_label, kon, koff, rt_text, kd_nM``
    (kon in /M/s, koff in /s; both > 0).  ``floor_kd_M`` draws the series'
    assay floor as a dashed iso-affinity line: compounds below it (tighter
    true affinity) read at the floor after ``incubation_s``.  Grade is shown
    by colour alone (square swatches in its legend), series by the marker's
    shape (outlined in the legend so every shape is visible); names appear on
    hover, or beside each point with ``labels=True``.
    """
    pts = points[(points["kon"] > 0) & (points["koff"] > 0)]
    if pts.empty:
        kon_lo, kon_hi, koff_lo, koff_hi = 1e4, 1e8, 1e-6, 1e-1
    else:
        kon_lo, kon_hi = pts["kon"].min() / 5, pts["kon"].max() * 5
        koff_lo, koff_hi = pts["koff"].min() / 5, pts["koff"].max() * 5
    kon_lo, kon_hi = 10 ** math.floor(math.log10(kon_lo)), 10 ** math.ceil(math.log10(kon_hi))
    koff_lo, koff_hi = 10 ** math.floor(math.log10(koff_lo)), 10 ** math.ceil(math.log10(koff_hi))
    x_title = "koff (/s, log scale)"
    y_title = "kon (/M/s, log scale)"
    xs = alt.Scale(type="log", domain=[koff_lo, koff_hi])
    ys = alt.Scale(type="log", domain=[kon_lo, kon_hi])
    decades = lambda lo, hi: [10.0 ** k for k in range(round(math.log10(lo)), round(math.log10(hi)) + 1)]  # noqa: E731
    x_axis = alt.Axis(format=".0e", grid=False, values=decades(koff_lo, koff_hi))
    y_axis = alt.Axis(format=".0e", grid=False, values=decades(kon_lo, kon_hi))
    koff_grid = np.geomspace(koff_lo, koff_hi, 60)
    iso = []
    for kd in KD_LINES_M:
        kon = koff_grid / kd
        keep = (kon >= kon_lo) & (kon <= kon_hi)
        if keep.sum() >= 2:
            iso.append(pd.DataFrame({"koff": koff_grid[keep], "kon": kon[keep], "line": f"KD {_conc_text(kd)}"}))
    layers = []
    if iso:
        iso_df = pd.concat(iso, ignore_index=True)
        layers.append(alt.Chart(iso_df).mark_line(color=theme.GUIDE, strokeWidth=0.8, opacity=0.7).encode(
            x=alt.X("koff:Q", scale=xs, title=x_title, axis=x_axis), y=alt.Y("kon:Q", scale=ys, title=y_title, axis=y_axis), detail="line:N",
            tooltip=[alt.Tooltip("line:N", title="Iso-affinity (KD = koff/kon)")]))
        ends = iso_df.groupby("line", as_index=False).last()
        layers.append(alt.Chart(ends).mark_text(align="right", baseline="bottom", dx=-4, dy=-2, fontSize=10, color=theme.GUIDE,
                                               font=theme.FONT).encode(
            x=alt.X("koff:Q", scale=xs), y=alt.Y("kon:Q", scale=ys), text="line:N"))
    rts = [rt for rt in RT_LINES_S if koff_lo <= 1 / rt <= koff_hi]
    if rts:
        rt_df = pd.DataFrame({"koff": [1 / rt for rt in rts], "line": [f"RT {RT_LABELS.get(rt, _rt_text(rt))}" for rt in rts]})
        layers.append(alt.Chart(rt_df).mark_rule(color=theme.GUIDE, strokeDash=[2, 4], strokeWidth=1).encode(
            x=alt.X("koff:Q", scale=xs, title=x_title, axis=x_axis), tooltip=[alt.Tooltip("line:N", title="Iso-residence time (RT = 1/koff)")]))
        rt_df["kon"] = kon_lo * 1.1
        layers.append(alt.Chart(rt_df).mark_text(align="left", baseline="bottom", dx=3, fontSize=10, color=theme.GUIDE, font=theme.FONT).encode(
            x=alt.X("koff:Q", scale=xs), y=alt.Y("kon:Q", scale=ys), text="line:N"))
    if floor_kd_M is not None and math.isfinite(floor_kd_M) and floor_kd_M > 0:
        kon = koff_grid / floor_kd_M
        keep = (kon >= kon_lo) & (kon <= kon_hi)
        if keep.sum() >= 2:
            fl = pd.DataFrame({"koff": koff_grid[keep], "kon": kon[keep], "line": floor_label or f"assay floor {_conc_text(floor_kd_M)}"})
            layers.append(alt.Chart(fl).mark_line(color=theme.FLOOR, strokeWidth=2.5, strokeDash=[8, 4]).encode(
                x=alt.X("koff:Q", scale=xs, title=x_title, axis=x_axis), y=alt.Y("kon:Q", scale=ys, title=y_title, axis=y_axis),
                tooltip=[alt.Tooltip("line:N", title="Assay floor")]))
    if incubation_s is not None and math.isfinite(incubation_s) and koff_lo <= 2 / incubation_s <= koff_hi:
        rule = pd.DataFrame({"koff": [2 / incubation_s], "line": [f"{_rt_text(incubation_s)} = 2 × RT"]})
        layers.append(alt.Chart(rule).mark_rule(color=theme.FLOOR, strokeWidth=1.5).encode(
            x=alt.X("koff:Q", scale=xs, title=x_title, axis=x_axis), tooltip=[alt.Tooltip("line:N", title="Incubation rule of thumb")]))
        layers.append(alt.Chart(rule).mark_text(align="left", baseline="top", dx=4, dy=4, fontSize=11, color=theme.FLOOR,
                                                font=theme.FONT).encode(x=alt.X("koff:Q", scale=xs), y=alt.value(4), text="line:N"))
    from ..fmt import conc, rate1, rate2

    pts = pts.assign(kon_text=[rate2(v) for v in pts["kon"]], koff_text=[rate1(v) for v in pts["koff"]],
                     kd_text=[conc(v * 1e-9) for v in pts["kd_nM"]])
    # The grade legend shows the grade's name and colour only: the glyphs of the badges are shapes, and on
    # this chart shapes mean series.
    styles = list(theme.GRADES.values()) + [theme.UNGRADED]
    pts = pts.assign(grade_name=[theme.style_for_label(v).label for v in pts["grade_label"]])
    grade_scale = alt.Scale(domain=[g.label for g in styles], range=[g.colour for g in styles])
    series_names = sorted(pts["series"].astype(str).unique())
    shapes = [SERIES_SHAPES[i % len(SERIES_SHAPES)] for i in range(len(series_names))]
    layers.append(alt.Chart(pts).mark_point(size=110, filled=True, opacity=0.95, stroke=theme.INK, strokeWidth=0.6).encode(
        x=alt.X("koff:Q", scale=xs, title=x_title, axis=x_axis), y=alt.Y("kon:Q", scale=ys, title=y_title, axis=y_axis),
        color=alt.Color("grade_name:N", scale=grade_scale, title="Grade (colour)",
                        legend=alt.Legend(symbolType="square", symbolStrokeWidth=0, orient="right")),
        shape=alt.Shape("series:N", title="Series (shape)", scale=alt.Scale(domain=series_names, range=shapes),
                        legend=alt.Legend(symbolFillColor="white", symbolStrokeColor=theme.INK, symbolStrokeWidth=1.5,
                                          symbolSize=120, orient="right")),
        tooltip=[alt.Tooltip("compound:N", title="Compound"), alt.Tooltip("series:N", title="Series"),
                 alt.Tooltip("stage:N", title="Stage"), alt.Tooltip("grade_name:N", title="Grade"),
                 alt.Tooltip("kon_text:N", title="kon"), alt.Tooltip("koff_text:N", title="koff"),
                 alt.Tooltip("rt_text:N", title="Residence time"), alt.Tooltip("kd_text:N", title="KD")],
    ))
    if labels:
        layers.append(alt.Chart(pts).mark_text(align="left", baseline="middle", dx=8, fontSize=10, color=theme.INK,
                                               font=theme.FONT).encode(
            x=alt.X("koff:Q", scale=xs), y=alt.Y("kon:Q", scale=ys), text="compound:N"))
    return _base(alt.layer(*layers), height=MAP_HEIGHT)


def _conc_text(m: float) -> str:
    from ..fmt import conc

    return conc(m)


def _rt_text(s: float) -> str:
    from ..fmt import duration

    return duration(s)


__all__ = [
    "grade_counts_chart", "grade_counts_frame", "fit_frames", "fit_chart", "incubation_grid",
    "apparent_affinity_frame", "apparent_affinity_chart", "engagement_frame", "engagement_chart",
    "kinetic_map_chart", "grade_colour_scale", "KD_LINES_M", "RT_LINES_S",
]
