"""A compound's evidence as display frames and charts (pure: no Streamlit, no database).

The evidence page, the what-if page and the review pack all build their
tables and charts here, from the grader's evidence model
(:mod:`tracker.rules.evidence`, reached through a grading result): nothing
kinetic is computed here, only converted to display units (nM, h) with the
unit in every column name and axis title.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from ..errors import KrtError
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..fmt import fold as fmt_fold
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
class CompoundEvidence:
    """One compound's evidence exactly as the grader saw it (:func:`tracker.rules.evidence.compound_evidence`).

    ``summary``: the compound's row of the grading (grade, residence time with
    interval, worst reading and its fold); ``kinetics``: the selected kinetics
    (dict, None without a measured koff); ``runs``: every kinetic run;
    ``readings``: the potency rows with the evidence model's predictions.
    """

    compound_id: int | None
    summary: dict
    kinetics: dict | None
    runs: pd.DataFrame
    readings: pd.DataFrame

    @property
    def koff(self) -> float | None:
        return _f((self.kinetics or {}).get("koff_per_s"))

    @property
    def kon(self) -> float | None:
        return _f((self.kinetics or {}).get("kon_per_M_s"))

    @property
    def kd(self) -> float | None:
        return _f((self.kinetics or {}).get("kd_M"))

    @property
    def rt_s(self) -> float | None:
        return 1.0 / self.koff if self.koff else None

    @property
    def source(self) -> str:
        k = self.kinetics
        if not k:
            return "no kinetic measurement"
        n = int(k.get("n_runs") or 1)
        ids = ", ".join(f"#{i}" for i in (k.get("kinetic_measurement_ids") or []))
        basis = k.get("kinetics_basis") or "one run"
        return f"{k.get('method')} ({basis}{'' if n == 1 else f' of {n}'}; measurement {ids})"


def of(result, name: str) -> CompoundEvidence:
    """The evidence of compound ``name`` in a grading result (empty when the grader did not see it)."""
    from ..rules.evidence import compound_evidence

    hit = result.compounds.loc[result.compounds["compound"] == name, "compound_id"] if len(result.compounds) else []
    if len(hit) == 0:
        return CompoundEvidence(None, {}, None, pd.DataFrame(), pd.DataFrame())
    cid = int(hit.iloc[0])
    ev = compound_evidence(result, cid)
    return CompoundEvidence(cid, ev["summary"], ev["kinetics"], ev["runs"], ev["readings"])


def kinetics_caption(ev: CompoundEvidence) -> str:
    """One line naming the kinetics the predictions use, with the residence time and its interval."""
    if not ev.koff:
        return "No residence time measured: predictions need koff, so only the measured values are shown."
    s = ev.summary
    lo, hi = _f(s.get("residence_time_low_s")), _f(s.get("residence_time_high_s"))
    ci = f" (95% interval {fmt_time(lo)} – {fmt_time(hi)})" if lo and hi else ""
    return f"Predictions use {ev.source}: residence time {fmt_time(ev.rt_s)}{ci}, KD {fmt_conc(ev.kd)}."


POTENCY_DISPLAY = ["assay", "readout", "format", "value_nM", "incubation_h", "predicted_nM", "equilibrium_nM", "fold", "fold_ci",
                   "min_incubation_h", "model", "value_text", "incubation_text"]


def potency_table(ev: CompoundEvidence) -> pd.DataFrame:
    """The readings with the evidence model's predictions, in display units (nothing computed here)."""
    r = ev.readings
    if r is None or r.empty:
        return pd.DataFrame(columns=POTENCY_DISPLAY)

    def col(name):
        return pd.to_numeric(r[name], errors="coerce") if name in r.columns else pd.Series(np.nan, index=r.index)

    lo, hi = col("fold_shift_low"), col("fold_shift_high")
    return pd.DataFrame({
        "assay": r["assay"], "readout": r["readout"], "format": r["format"],
        "value_nM": col("value_M") / NM, "incubation_h": col("incubation_s") / H,
        "predicted_nM": col("predicted_apparent_M") / NM, "equilibrium_nM": col("corrected_affinity_M") / NM,
        "fold": col("fold_shift"),
        "fold_ci": [f"{fmt_fold(a)} – {fmt_fold(b)}" if a == a and b == b else "–" for a, b in zip(lo, hi)],
        "min_incubation_h": col("min_incubation_s") / H,
        "model": r["simulated_as"].fillna("") if "simulated_as" in r.columns else "",
        "value_text": r.get("value_text"), "incubation_text": r.get("incubation_text"),
    }, columns=POTENCY_DISPLAY).reset_index(drop=True)


def _reading_for_curve(readings: pd.DataFrame) -> dict | None:
    """The reading whose format the curve follows: the first fully described competition reading, else None."""
    if readings is None or readings.empty:
        return None
    comp = readings[(readings["format"] == "competition-binding") & (readings.get("simulated_as") == "competition")] \
        if "simulated_as" in readings.columns else readings.iloc[0:0]
    return comp.iloc[0].to_dict() if len(comp) else None


def affinity_chart(ev: CompoundEvidence, readings: pd.DataFrame | None = None, *, koff: float | None = None,
                   kd: float | None = None) -> alt.Chart:
    """Apparent affinity against incubation: the evidence model's curve, the compound's own readings, 2 x RT.

    ``readings``/``koff``/``kd`` replace the compound's own (the what-if page).
    """
    pot = ev.readings if readings is None else readings
    koff = ev.koff if koff is None else koff
    kd = ev.kd if kd is None else kd
    measured = pd.DataFrame({
        "incubation_h": pd.to_numeric(pot["incubation_s"], errors="coerce") / H if len(pot) else [],
        "value_nM": pd.to_numeric(pot["value_M"], errors="coerce") / NM if len(pot) else [],
        "assay": pot["assay"] if len(pot) else [],
        "readout": pot["readout"] if len(pot) else [],
    })
    curve = pd.DataFrame(columns=["incubation_h", "apparent_nM", "fold"])
    label = "predicted (one-step read)"
    if koff and kd:
        t = charts.incubation_grid(koff, list(pd.to_numeric(pot["incubation_s"], errors="coerce").dropna()) if len(pot) else [])
        reading = _reading_for_curve(pot)
        curve = charts.apparent_affinity_frame(kd, koff, t, reading)
        label = f"predicted ({curve['model'].iloc[0]})" if len(curve) else label
    rt_h = 1.0 / koff / H if koff else None
    kd_nM = kd / NM if kd else None
    return charts.apparent_affinity_chart(curve, measured, rt_h=rt_h, kd_nM=kd_nM, model_label=label)


def pk_label(row: pd.Series) -> str:
    parts = [str(row.get("species")), str(row.get("route")), f"t½ {row.get('half_life_text') or ''}".strip(),
             f"free Cmax {row.get('free_cmax_text') or ''}".strip()]
    if row.get("dosing_interval_text"):
        parts.append(f"every {row['dosing_interval_text']}")
    return " · ".join(p for p in parts if p and p != "None")


def engagement(result, compound_id: int | None, *, n_doses: int | None = None) -> dict | None:
    """The engagement the duration check simulated for this compound (:func:`tracker.rules.evidence.engagement_summary`)."""
    from ..rules.evidence import engagement_summary

    if compound_id is None:
        return None
    return engagement_summary(result, compound_id, n_doses=n_doses)


def engagement_regimen(eng: dict) -> str:
    """The regimen the duration check judged, in words (the tiles and the chart show the same)."""
    reg = f"{eng['regimen']} · {eng['route']}, free Cmax {fmt_conc(eng['cmax'])}, t½ {fmt_time(eng['half_life'])}"
    thr = f"threshold {100 * eng['threshold']:.0f}%" + (" (rules default; the program sets none)" if eng["threshold_is_default"] else "")
    return f"{reg}; {thr}"


def engagement_chart(eng: dict, program: dict) -> alt.Chart:
    frame = charts.engagement_frame(eng["series"])
    h = lambda k: (_f(program.get(k)) / H) if _f(program.get(k)) else None  # noqa: E731
    return charts.engagement_chart(frame, threshold=eng["threshold"], onset_max_h=h("onset_max_s"), offset_max_h=h("offset_max_s"),
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


__all__ = ["CompoundEvidence", "of", "kinetics_caption", "potency_table", "affinity_chart", "pk_label", "engagement",
           "engagement_regimen", "engagement_chart", "fit_charts", "fit_summary"]
