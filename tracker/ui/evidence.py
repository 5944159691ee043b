"""A compound's evidence as display frames and charts (pure: no Streamlit, no database).

The evidence page, the what-if page and the review pack all build their
tables and charts here, from the dict :func:`tracker.ui.data.read_compound`
returns (or an edited copy of it, for what-if).  Inputs are SI; outputs are
display units (nM, h) with the unit in every column name and axis title.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from ..errors import KrtError
from . import charts

NM = 1e-9
H = 3600.0


def _f(v: Any) -> float | None:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) and x > 0 else None


@dataclass(frozen=True)
class Kinetics:
    """The kinetics the predictions use: koff, kon and KD (SI), and where each came from."""

    koff: float | None
    kon: float | None
    kd: float | None
    source: str

    @property
    def rt_s(self) -> float | None:
        return 1.0 / self.koff if self.koff else None

    @property
    def complete(self) -> bool:
        return self.koff is not None and self.kon is not None and self.kd is not None


def best_kinetics(kinetics: pd.DataFrame, potency: pd.DataFrame | None = None) -> Kinetics:
    """The latest measured kinetics (undated rows count as oldest); KD = koff/kon, else the stored KD.

    Without kon, KD falls back to the stored KD, then to the tightest potency
    value projected to equilibrium with this koff (labelled as such).
    """
    if kinetics is None or kinetics.empty:
        return Kinetics(None, None, None, "no kinetic measurement")
    k = kinetics.copy()
    k["_date"] = pd.to_datetime(k.get("measured_on"), errors="coerce")
    k = k.sort_values(["_date", "id"], ascending=[True, True], na_position="first")
    row = k.iloc[-1]
    koff, kon, kd = _f(row.get("koff_per_s")), _f(row.get("kon_per_M_s")), _f(row.get("kd_M"))
    source = f"{row.get('method')} measurement #{int(row['id'])}"
    if koff and kon:
        return Kinetics(koff, kon, koff / kon, source)
    if koff and kd:
        return Kinetics(koff, koff / kd, kd, source + " (kon = koff/KD)")
    if koff and potency is not None and not potency.empty:
        tab = potency_table(potency, Kinetics(koff, None, None, source))
        eq = tab["equilibrium_nM"].dropna()
        if not eq.empty:
            kd = float(eq.min()) * NM
            return Kinetics(koff, koff / kd, kd, source + " (KD from potency projected to equilibrium)")
    return Kinetics(koff, kon, kd, source)


def _competition_args(row: pd.Series) -> dict[str, float] | None:
    if row.get("format") != "competition-binding":
        return None
    tc, tk, trt = _f(row.get("tracer_conc_M")), _f(row.get("tracer_kd_M")), _f(row.get("tracer_residence_time_s"))
    if tc is None or tk is None or trt is None:
        return None
    return {"tracer_conc": tc, "tracer_kd": tk, "tracer_koff": 1.0 / trt}


def potency_table(potency: pd.DataFrame, kin: Kinetics) -> pd.DataFrame:
    """Potency rows with the predicted apparent affinity at their incubation, the equilibrium projection and the fold.

    * ``predicted_nM``: what the assay should read after its incubation if the
      compound's true KD is the kinetic one (needs KD and koff);
    * ``equilibrium_nM``: the measured value divided by the predicted fold
      (the affinity projected to equilibrium; needs koff);
    * ``fold``: predicted apparent/true at that incubation.
    Competition-binding rows with a full tracer description use the
    competition model, others the saturation model.
    """
    from ..kinetics.assay import apparent_affinity

    cols = ["assay", "readout", "format", "value_nM", "incubation_h", "predicted_nM", "equilibrium_nM", "fold", "model", "value_text", "incubation_text"]
    if potency is None or potency.empty:
        return pd.DataFrame(columns=cols)
    rows = []
    for _, r in potency.iterrows():  # a compound has a handful of potency rows
        value, t = _f(r.get("value_M")), _f(r.get("incubation_s"))
        out = {"assay": r.get("assay"), "readout": r.get("readout"), "format": r.get("format"),
               "value_nM": value / NM if value else np.nan, "incubation_h": t / H if t else np.nan,
               "predicted_nM": np.nan, "equilibrium_nM": np.nan, "fold": np.nan, "model": "",
               "value_text": r.get("value_text"), "incubation_text": r.get("incubation_text")}
        if kin.koff and t:
            comp = _competition_args(r)
            kd_for_model = kin.kd or (value if value else 1e-9)
            try:
                if comp and kin.kd:
                    res = apparent_affinity(kin.kd, kin.koff, t, format="competition", **comp)
                    out["model"] = "competition"
                else:
                    res = apparent_affinity(kd_for_model, kin.koff, t)
                    out["model"] = "saturation"
                fold = float(np.asarray(res.fold))
                out["fold"] = fold
                if value:
                    out["equilibrium_nM"] = value / fold / NM
                if kin.kd:
                    out["predicted_nM"] = float(np.asarray(res.apparent)) / NM
            except KrtError:
                pass
        rows.append(out)
    return pd.DataFrame(rows, columns=cols)


def affinity_chart(potency: pd.DataFrame, kin: Kinetics) -> alt.Chart:
    """Apparent affinity against incubation: prediction from the kinetics, the compound's own assays, 2 x RT."""
    measured = pd.DataFrame({
        "incubation_h": potency["incubation_s"].astype(float) / H if not potency.empty else [],
        "value_nM": potency["value_M"].astype(float) / NM if not potency.empty else [],
        "assay": potency["assay"] if not potency.empty else [],
        "readout": potency["readout"] if not potency.empty else [],
    })
    curve = pd.DataFrame(columns=["incubation_h", "apparent_nM", "fold"])
    label = "predicted (saturation model)"
    if kin.koff and kin.kd:
        t = charts.incubation_grid(kin.koff, list(potency["incubation_s"].astype(float)) if not potency.empty else [])
        comp = None
        if not potency.empty:
            for _, r in potency.iterrows():
                comp = _competition_args(r)
                if comp:
                    break
        if comp:
            curve = charts.apparent_affinity_frame(kin.kd, kin.koff, t, **comp)
            label = "predicted (competition model, this tracer)"
        else:
            curve = charts.apparent_affinity_frame(kin.kd, kin.koff, t)
    rt_h = kin.rt_s / H if kin.rt_s else None
    kd_nM = kin.kd / NM if kin.kd else None
    return charts.apparent_affinity_chart(curve, measured, rt_h=rt_h, kd_nM=kd_nM, model_label=label)


def pk_label(row: pd.Series) -> str:
    parts = [str(row.get("species")), str(row.get("route")), f"t½ {row.get('half_life_text') or ''}".strip(),
             f"free Cmax {row.get('free_cmax_text') or ''}".strip()]
    if row.get("dosing_interval_text"):
        parts.append(f"every {row['dosing_interval_text']}")
    return " · ".join(p for p in parts if p and p != "None")


@dataclass(frozen=True)
class PKInput:
    route: str
    cmax: float
    half_life: float
    tmax: float | None
    dosing_interval: float | None

    @classmethod
    def from_row(cls, row: pd.Series, program: dict | None = None) -> "PKInput":
        tau = _f(row.get("dosing_interval_s")) or (_f((program or {}).get("dosing_interval_s")))
        return cls(route=str(row["route"]), cmax=float(row["free_cmax_M"]), half_life=float(row["half_life_s"]),
                   tmax=_f(row.get("tmax_s")), dosing_interval=tau)


def judged_engagement(kin: Kinetics, pk: PKInput, program: dict | None = None, *, config=None, series: bool = True,
                      max_points: int = 700) -> dict:
    """The engagement the ``duration-mismatch`` rule judges, for one compound under one PK profile.

    Regimen, threshold and numbers come from
    :func:`tracker.rules.engagement.compound_engagement` (the grader's own
    function): one dose, or with a dosing interval (the program's, else the
    PK study's) the regimen at steady state.  ``config``: the program's
    :class:`~tracker.rules.config.RuleConfig` (default: the shipped defaults).
    """
    from ..rules.config import DEFAULTS
    from ..rules.engagement import compound_engagement

    if not (kin.koff and kin.kon):
        raise KrtError("engagement needs koff and kon (or KD)")
    if pk.route == "oral" and pk.tmax is None:
        raise KrtError("oral PK needs tmax")
    cfg = config or DEFAULTS
    pk_row = {"route": pk.route, "free_cmax_M": pk.cmax, "half_life_s": pk.half_life, "tmax_s": pk.tmax,
              "dosing_interval_s": pk.dosing_interval}
    return compound_engagement(kin.kon, kin.koff, pk_row, program or {}, default_threshold=cfg.default_engagement_threshold,
                               bound_degradation_factor=cfg.bound_target_degradation_factor, series=series, max_points=max_points)


def engagement(kin: Kinetics, pk: PKInput, *, program: dict | None = None, config=None, max_points: int = 700) -> dict:
    """Engagement time series (SI arrays) of the judged regimen (see :func:`judged_engagement`)."""
    return judged_engagement(kin, pk, program, config=config, max_points=max_points)["timeseries"]


def engagement_metrics(kin: Kinetics, pk: PKInput, program: dict | None = None, *, config=None) -> dict[str, Any]:
    """The judged numbers (NaN -> None) with ``regimen``, ``threshold`` and ``duration_set_by``."""
    res = judged_engagement(kin, pk, program, config=config, series=False)
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in res.items()}


def engagement_chart(kin: Kinetics, pk: PKInput, program: dict, *, config=None, judged: dict | None = None) -> alt.Chart:
    """The judged regimen against time: one dose, or a steady-state interval then the last dose and the washout.

    ``judged``: a :func:`judged_engagement` result already at hand (not recomputed)."""
    res = judged if judged is not None else judged_engagement(kin, pk, program, config=config)
    thr = res["threshold"]
    frame = charts.engagement_frame(res["timeseries"])
    h = lambda k: (_f(program.get(k)) / H) if _f(program.get(k)) else None  # noqa: E731
    return charts.engagement_chart(frame, threshold=thr, onset_max_h=h("onset_max_s"), offset_max_h=h("offset_max_s"),
                                   duration_min_h=h("duration_min_s"))


def fit_charts(fits: list[dict]) -> list[tuple[str, alt.Chart, dict]]:
    """``(title, chart, summary)`` for each stored fit."""
    from ..kinetics.fitting import FitResult

    out = []
    for f in fits:
        try:
            points, curves, x_title, x_kind = charts.fit_frames(f["fit"], f["data"])
        except (KeyError, ValueError, KrtError) as exc:
            out.append((f"{f['method']} fit #{f['id']} (cannot redraw: {exc})", None, {}))
            continue
        res = FitResult.from_dict(f["fit"])
        title = f"{f['method']} · {f['source']}" if f.get("source") else f["method"]
        out.append((title, charts.fit_chart(points, curves, x_title, x_kind), fit_summary(res)))
    return out


def fit_summary(res) -> dict[str, str]:
    """Headline numbers of a fit in display units, with their 95% intervals."""
    from ..fmt import conc as fmt_conc
    from ..fmt import duration as fmt_time
    from ..fmt import fold, pct, rate1, rate2

    est, ci = res.estimates, res.ci95
    out: dict[str, str] = {}

    def interval(name, fmt):
        lo_hi = ci.get(name)
        if not lo_hi:
            return ""
        lo, hi = lo_hi
        lo_t = fmt(lo) if lo and math.isfinite(lo) and lo > 0 else "open"
        hi_t = fmt(hi) if hi and math.isfinite(hi) else "open"
        return f" (95% CI {lo_t} – {hi_t})"

    if _f(est.get("residence_time")):
        out["Residence time"] = fmt_time(est["residence_time"]) + interval("residence_time", fmt_time)
    if _f(est.get("koff")):
        out["koff"] = rate1(est["koff"]) + interval("koff", rate1)
    if _f(est.get("kon")):
        out["kon"] = rate2(est["kon"]) + interval("kon", rate2)
    if _f(est.get("kd")):
        out["KD"] = fmt_conc(est["kd"]) + interval("kd", fmt_conc)
    if _f(est.get("ki_shift_ratio")):
        out["Ki shift"] = fold(est["ki_shift_ratio"]) + interval("ki_shift_ratio", fold)
    if est.get("max_response_fraction") is not None and math.isfinite(est["max_response_fraction"]):
        out["Max response"] = f"{pct(est['max_response_fraction'])} of control"
    if res.r_squared is not None and math.isfinite(res.r_squared):
        out["R²"] = f"{res.r_squared:.3f}"
    if res.warnings:
        out["Warnings"] = "; ".join(m for _, m in res.warnings)
    return out


__all__ = ["Kinetics", "best_kinetics", "potency_table", "affinity_chart", "PKInput", "pk_label", "engagement",
           "engagement_metrics", "engagement_chart", "judged_engagement", "fit_charts", "fit_summary"]
