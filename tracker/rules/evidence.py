"""The evidence model: the one place that turns measurements into kinetic judgements.

Every kinetic number the grader, the CLI, the review pack and the dashboard
show comes from here (pure: DataFrames in, DataFrames out; SI units):

:func:`select_kinetics`
    a compound's kinetics from all its kinetic measurements.  One run is
    taken as measured; several runs are combined by the geometric mean of
    koff and kon, with the between-run spread carried into the 95% interval
    (Student t on log koff, combined with the runs' own intervals).  Runs
    whose residence times differ by more than ``conflict_fold`` conflict:
    the compound then carries the *conservative* value, the slowest koff
    (the longest residence time, which predicts the largest potency
    artefact) with an interval spanning every run, until a lead resolves the
    conflict.
:func:`predict_readings`
    for every potency reading, what its assay format reports after its own
    incubation: the fold shift apparent/true with its interval from the
    kinetic interval, the affinity corrected to equilibrium, and the
    format-aware shortest incubation that reads within tolerance.  Tracer
    competition is simulated with the tracer's own kinetics, concentration
    and pre-incubation (Motulsky & Mahan 1984, Mol Pharmacol 25:1-9; Ki by
    Cheng & Prusoff 1973, Biochem Pharmacol 22:3099-3108, or by Munson &
    Rodbard 1988, J Recept Res 8:533-546 when the receptor concentration in
    the well makes tracer depletion matter).  Enzyme and functional formats
    are approximated as a one-step binding read over pre-incubation plus
    incubation, and say so.
:func:`summarise`
    one row per compound: residence time with interval, the number of runs,
    and the WORST reading (largest fold away from 1 in either direction)
    with its fold, interval and which reading it is.
:func:`compound_evidence`
    one compound's kinetics, readings and worst reading, for the pages.
:func:`affinity_curve`, :func:`floor_of_series`, :func:`engagement_summary`
    the curves and tiles the pages draw, computed with the same models and
    inputs the grader used.

These are models of ideal assays; they are decision support for reading
potency data, not dosing advice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..kinetics.assay import apparent_affinity, assay_floor, min_incubation, saturation_fold
from ..kinetics.equations import cheng_prusoff_ki, munson_rodbard_ki, tracer_bound_free_ratio
from ..fmt import duration as fmt_time

__all__ = [
    "KINETICS_COLUMNS",
    "READING_COLUMNS",
    "KineticsSelection",
    "select_kinetics",
    "predict_readings",
    "reading_label",
    "summarise",
    "compound_evidence",
    "affinity_curve",
    "floor_of_series",
    "engagement_summary",
    "QUALITATIVE_METHODS",
]

QUALITATIVE_METHODS = ("ki-shift", "insurmountability")

#: One row per compound with measured kinetics (see :func:`select_kinetics`).
KINETICS_COLUMNS = ["compound_id", "kinetic_measurement_id", "kinetic_measurement_ids", "koff_per_s", "kon_per_M_s", "kd_M",
                    "koff_low_per_s", "koff_high_per_s", "method", "rt_lower_bound", "n_runs", "koff_gmean_per_s",
                    "koff_spread_fold", "conflict", "kinetics_basis"]

#: Columns :func:`predict_readings` adds to each potency row.
READING_COLUMNS = ["fold_shift", "fold_shift_low", "fold_shift_high", "corrected_affinity_M", "kd_used_M", "predicted_apparent_M",
                   "simulated_as", "note", "min_incubation_s", "effective_incubation_s"]

_T975 = {2: 12.706, 3: 4.303, 4: 3.182, 5: 2.776, 6: 2.571, 7: 2.447, 8: 2.365, 9: 2.306, 10: 2.262}  # Student t, 0.975, n-1 df (statistical tables)


def _num(df: pd.DataFrame, name: str) -> np.ndarray:
    if name not in df.columns:
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[name], errors="coerce").to_numpy(dtype=float)


def _col(x, n: int) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return np.broadcast_to(a, (n,)).copy() if a.ndim == 0 else a.reshape(n)


def _t975(n: np.ndarray) -> np.ndarray:
    """Two-sided 95% Student t quantile for n runs (n-1 degrees of freedom); 1.96 from 11 runs on."""
    return np.array([_T975.get(int(k), 1.96) for k in n], dtype=float)


# ----------------------------------------------------------------------------- kinetics selection
@dataclass
class KineticsSelection:
    """Output of :func:`select_kinetics`.

    ``chosen``: :data:`KINETICS_COLUMNS`, one row per compound with a measured
    koff.  ``qualitative``: rows carrying a saved Ki-shift or
    insurmountability fit (no residence time; parsed by the grader).
    ``runs``: every measured row with its residence time, for the conflict
    finding and the pages.
    """

    chosen: pd.DataFrame
    qualitative_mask: pd.Series
    runs: pd.DataFrame


def select_kinetics(kinetics: pd.DataFrame | None, *, fit_methods: pd.Series | None = None, rt_lower_bound: pd.Series | None = None,
                    conflict_fold=3.0) -> KineticsSelection:
    """Combine each compound's kinetic runs into one set of kinetics (see the module docstring).

    ``kinetics``: rows with ``id``, ``compound_id``, ``method``, ``koff_per_s``,
    ``kon_per_M_s``, ``kd_M``, ``koff_low_per_s``, ``koff_high_per_s``
    (optional ``measured_on``).  ``fit_methods``: the method of a saved fit per
    row (index aligned; Ki-shift and insurmountability fits are not
    measurements of koff).  ``rt_lower_bound``: per row, the fit only bounds
    RT from below.  ``conflict_fold``: scalar, or a Series compound_id -> fold.

    Combined interval (design choice, stated here once): on log koff, the
    half-width is sqrt(w**2 + (t * s / sqrt(n))**2), where s is the
    between-run standard deviation, t the 95% Student quantile with n-1
    degrees of freedom, and w the runs' own mean 95% half-width divided by
    sqrt(n) (runs without an interval contribute none).
    """
    empty = pd.DataFrame({c: pd.Series(dtype=object) for c in KINETICS_COLUMNS})
    if kinetics is None or kinetics.empty:
        return KineticsSelection(empty, pd.Series(dtype=bool), pd.DataFrame())
    kin = kinetics
    fit_m = fit_methods.reindex(kin.index) if fit_methods is not None else pd.Series(None, index=kin.index, dtype=object)
    qual = fit_m.isin(QUALITATIVE_METHODS)
    koff_all = pd.to_numeric(kin["koff_per_s"], errors="coerce")
    m = kin[~qual & (koff_all > 0)].copy()
    if m.empty:
        return KineticsSelection(empty, qual, pd.DataFrame())
    lb = rt_lower_bound.reindex(m.index).fillna(False).astype(bool) if rt_lower_bound is not None else pd.Series(False, index=m.index)
    koff = _num(m, "koff_per_s")
    kon = _num(m, "kon_per_M_s")
    kd = _num(m, "kd_M")
    kon = np.where(np.isfinite(kon) & (kon > 0), kon, np.where(np.isfinite(kd) & (kd > 0), koff / kd, np.nan))
    k_lo, k_hi = _num(m, "koff_low_per_s"), _num(m, "koff_high_per_s")
    runs = pd.DataFrame({
        "compound_id": m["compound_id"].to_numpy(), "kinetic_measurement_id": m["id"].to_numpy(), "method": m["method"].to_numpy(dtype=object),
        "koff_per_s": koff, "kon_per_M_s": kon, "koff_low_per_s": k_lo, "koff_high_per_s": k_hi,
        "residence_time_s": 1.0 / koff, "rt_lower_bound": lb.to_numpy(),
        "measured_on": m["measured_on"].to_numpy() if "measured_on" in m.columns else pd.NaT,
    })
    runs["_lk"] = np.log(koff)
    runs["_lkon"] = np.log(kon)
    hw = (np.log(k_hi) - np.log(k_lo)) / 2.0
    runs["_hw"] = np.where(np.isfinite(hw) & (hw > 0), hw, np.nan)
    # newest run last (undated first, then by id): the representative id of the combined value
    runs = runs.sort_values(["compound_id", "measured_on", "kinetic_measurement_id"], na_position="first", kind="mergesort")
    g = runs.groupby("compound_id", sort=True)
    out = pd.DataFrame({
        "n_runs": g.size(),
        "_mean": g["_lk"].mean(),
        "_sd": g["_lk"].std(ddof=1),
        "_min": g["_lk"].min(),
        "_max": g["_lk"].max(),
        "_kon": g["_lkon"].mean(),  # NaN kon values are skipped
        "_hw": g["_hw"].mean(),
        "_hw_n": g["_hw"].count(),
        "kinetic_measurement_id": g["kinetic_measurement_id"].last(),
        "kinetic_measurement_ids": g["kinetic_measurement_id"].agg(lambda s: [int(i) for i in s]),
        "method": g["method"].agg(lambda s: ", ".join(dict.fromkeys(s))),
        "rt_lower_bound": g["rt_lower_bound"].any(),
        "_lo_min": g["koff_low_per_s"].min(),
        "_hi_max": g["koff_high_per_s"].max(),
        "_kmin": g["koff_per_s"].min(),
        "_kmax": g["koff_per_s"].max(),
    })
    slowest = runs.loc[runs.groupby("compound_id")["_lk"].idxmin()].set_index("compound_id")
    n = out["n_runs"].to_numpy(dtype=float)
    cids = out.index.to_numpy()
    fold_lim = (conflict_fold.reindex(cids).fillna(3.0).to_numpy(float) if isinstance(conflict_fold, pd.Series)
                else _col(conflict_fold, cids.size))
    spread = np.exp(out["_max"].to_numpy() - out["_min"].to_numpy())
    conflict = (n >= 2) & (spread > fold_lim)
    mean = out["_mean"].to_numpy()
    sd = out["_sd"].fillna(0.0).to_numpy()
    w = out["_hw"].to_numpy() / np.sqrt(np.maximum(out["_hw_n"].to_numpy(dtype=float), 1.0))
    w = np.where(np.isfinite(w), w, 0.0)
    half = np.sqrt(w ** 2 + (_t975(n) * sd / np.sqrt(n)) ** 2)
    single = n == 1
    slow_k = slowest["koff_per_s"].reindex(cids).to_numpy(float)
    slow_kon = slowest["kon_per_M_s"].reindex(cids).to_numpy(float)
    koff_c = np.where(conflict, slow_k, np.exp(mean))
    kon_c = np.where(conflict, np.where(np.isfinite(slow_kon), slow_kon, np.exp(out["_kon"].to_numpy())), np.exp(out["_kon"].to_numpy()))
    all_lo = np.fmin(out["_lo_min"].to_numpy(float), out["_kmin"].to_numpy(float))
    all_hi = np.fmax(out["_hi_max"].to_numpy(float), out["_kmax"].to_numpy(float))
    one = runs.drop_duplicates("compound_id", keep="last").set_index("compound_id").reindex(cids)
    lo = np.where(single, one["koff_low_per_s"].to_numpy(float), np.where(conflict, all_lo, np.exp(mean - half)))
    hi = np.where(single, one["koff_high_per_s"].to_numpy(float), np.where(conflict, all_hi, np.exp(mean + half)))
    chosen = pd.DataFrame({
        "compound_id": cids,
        "kinetic_measurement_id": np.where(conflict, slowest["kinetic_measurement_id"].reindex(cids).to_numpy(), out["kinetic_measurement_id"].to_numpy()),
        "kinetic_measurement_ids": out["kinetic_measurement_ids"].to_numpy(),
        "koff_per_s": koff_c,
        "kon_per_M_s": kon_c,
        "kd_M": koff_c / kon_c,
        "koff_low_per_s": lo,
        "koff_high_per_s": hi,
        "method": out["method"].to_numpy(dtype=object),
        "rt_lower_bound": out["rt_lower_bound"].to_numpy(dtype=bool),
        "n_runs": out["n_runs"].to_numpy(dtype=int),
        "koff_gmean_per_s": np.exp(mean),
        "koff_spread_fold": spread,
        "conflict": conflict,
        "kinetics_basis": np.where(single, "one run", np.where(conflict, "conflicting runs: the slowest (conservative)",
                                                               "geometric mean of runs")).astype(object),
    })
    # a single run without kon keeps the stored KD (kon = koff/KD) as before; NaN stays NaN
    return KineticsSelection(chosen.reset_index(drop=True), qual, runs.drop(columns=["_lk", "_lkon", "_hw"]).reset_index(drop=True))


# ----------------------------------------------------------------------------- predictions per reading
_FORMAT_NOTE = {
    "binding": "",
    "competition-binding": "",
    "enzyme": "enzyme format approximated as a one-step binding read",
    "functional": "functional format approximated as a one-step binding read",
}


def reading_label(assay, readout, incubation_s, potency_id=None) -> str:
    """``'HF bind 1h KD @ 1 h (#12)'``: how a reading is named wherever it is shown."""
    t = fmt_time(float(incubation_s)) if incubation_s is not None and np.isfinite(float(incubation_s)) else "?"
    pid = f" (#{int(potency_id)})" if potency_id is not None and not (isinstance(potency_id, float) and math.isnan(potency_id)) else ""
    return f"{assay} {readout} @ {t}{pid}"


def _ki_from_ic50(ic50, L, kd_t, receptor):
    """Ki of a competition IC50: Munson & Rodbard where the receptor concentration is known, else Cheng & Prusoff."""
    ki = cheng_prusoff_ki(ic50, L, kd_t)
    dep = np.isfinite(receptor) & (receptor > 0)
    if np.any(dep):
        y0 = tracer_bound_free_ratio(receptor[dep], L[dep], kd_t[dep])
        ki = np.array(ki, dtype=float)
        ki[dep] = munson_rodbard_ki(ic50[dep], L[dep], kd_t[dep], y0)
    return ki


def predict_readings(rows: pd.DataFrame, *, tolerance=1.25) -> pd.DataFrame:
    """Predicted fold (apparent/true) of each potency reading at its own incubation, and its minimum incubation.

    Columns used: ``value_M``, ``incubation_s``, ``format``, ``readout``,
    ``tracer_conc_M``, ``tracer_kd_M``, ``tracer_residence_time_s``,
    ``preincubation_s``, ``target_conc_M`` (all optional but the first three)
    and the compound's kinetics ``koff_per_s``, ``kon_per_M_s``, ``kd_M``,
    ``koff_low_per_s``, ``koff_high_per_s``.  Rows without koff get NaN.

    ``competition-binding`` rows with the tracer's concentration, KD and
    residence time are simulated as tracer competition (pre-incubation of
    the compound with the receptor included); every other row as a one-step
    read over pre-incubation + incubation.  The compound's KD is the
    measured one (koff/kon), else the reported value corrected by the
    one-step fold.  The fold interval re-evaluates the fold at the ends of
    the koff interval (kon held).  ``min_incubation_s``: shortest incubation
    (after pre-incubation) that reads within ``tolerance``-fold.

    Returns a frame on the same index with :data:`READING_COLUMNS`.
    """
    n = len(rows)
    out = pd.DataFrame(index=rows.index)
    koff = _num(rows, "koff_per_s")
    value = _num(rows, "value_M")
    t = _num(rows, "incubation_s")
    pre = np.nan_to_num(_num(rows, "preincubation_s"), nan=0.0)
    pre = np.where(pre > 0, pre, 0.0)
    L = _num(rows, "tracer_conc_M")
    kd_t = _num(rows, "tracer_kd_M")
    rt_t = _num(rows, "tracer_residence_time_s")
    receptor = _num(rows, "target_conc_M")
    kon = _num(rows, "kon_per_M_s")
    kd = _num(rows, "kd_M")
    k_lo = _num(rows, "koff_low_per_s")
    k_hi = _num(rows, "koff_high_per_s")
    tol = _col(tolerance, n)
    fmt = rows["format"].astype(object).to_numpy() if "format" in rows.columns else np.full(n, "binding", object)
    readout = rows["readout"].astype(object).to_numpy() if "readout" in rows.columns else np.full(n, "KD", object)
    ok = np.isfinite(koff) & (koff > 0) & np.isfinite(value) & (value > 0) & np.isfinite(t) & (t > 0)
    tracer_ok = np.isfinite(L) & (L > 0) & np.isfinite(kd_t) & (kd_t > 0) & np.isfinite(rt_t) & (rt_t > 0)
    comp = ok & (fmt == "competition-binding") & tracer_ok
    sat = ok & ~comp
    t_eff = np.where(comp, t, t + pre)  # one-step approximation: the compound binds during pre-incubation too
    fold = np.full(n, np.nan)
    f_lo = np.full(n, np.nan)
    f_hi = np.full(n, np.nan)
    kd_used = np.full(n, np.nan)
    t_min = np.full(n, np.nan)
    kon_ok = np.isfinite(kon) & (kon > 0)
    kd_meas = np.where(np.isfinite(kd) & (kd > 0), kd, np.where(kon_ok, koff / np.where(kon_ok, kon, 1.0), np.nan))
    note = np.array([_FORMAT_NOTE.get(f, "approximated as a one-step binding read") for f in fmt], dtype=object)
    note[(fmt == "competition-binding") & ~tracer_ok] = "tracer not fully described: approximated as a one-step binding read"
    note[~ok] = ""
    if sat.any():
        i = np.nonzero(sat)[0]
        j_lo = i[np.isfinite(k_lo[i]) & (k_lo[i] > 0)]
        j_hi = i[np.isfinite(k_hi[i]) & (k_hi[i] > 0)]
        x = saturation_fold(np.concatenate([koff[i] * t_eff[i], k_lo[j_lo] * t_eff[j_lo], k_hi[j_hi] * t_eff[j_hi]]))
        fold[i] = x[: i.size]
        f_hi[j_lo] = x[i.size: i.size + j_lo.size]
        f_lo[j_hi] = x[i.size + j_lo.size:]
        kd_used[i] = np.where(np.isfinite(kd_meas[i]), kd_meas[i], value[i] / fold[i])
        t_min[i] = np.maximum(min_incubation(kd_used[i], koff[i], tolerance=tol[i]) - pre[i], 0.0)
    if comp.any():
        i = np.nonzero(comp)[0]
        ki_reported = np.where(readout[i] == "IC50", _ki_from_ic50(value[i], L[i], kd_t[i], receptor[i]), value[i])
        kd_i = kd_meas[i].copy()
        est = ~np.isfinite(kd_i)
        if est.any():
            kd_i[est] = ki_reported[est] / saturation_fold(koff[i][est] * t[i][est])
        kd_used[i] = kd_i
        kon_i = koff[i] / kd_i
        m_lo = np.isfinite(k_lo[i]) & (k_lo[i] > 0)
        m_hi = np.isfinite(k_hi[i]) & (k_hi[i] > 0)
        rows_ = np.concatenate([i, i[m_lo], i[m_hi]])
        k_all = np.concatenate([koff[i], k_lo[i][m_lo], k_hi[i][m_hi]])
        kon_all = np.concatenate([kon_i, kon_i[m_lo], kon_i[m_hi]])
        res = apparent_affinity(k_all / kon_all, k_all, t[rows_], format="competition", tracer_kd=kd_t[rows_],
                                tracer_koff=1.0 / rt_t[rows_], tracer_conc=L[rows_], preincubation=pre[rows_])
        n_i, n_lo = i.size, int(m_lo.sum())
        fold[i] = res.fold[:n_i]
        f_hi[i[m_lo]] = res.fold[n_i: n_i + n_lo]
        f_lo[i[m_hi]] = res.fold[n_i + n_lo:]
        t_min[i] = min_incubation(kd_i, koff[i], tolerance=tol[i], format="competition", tracer_kd=kd_t[i],
                                  tracer_koff=1.0 / rt_t[i], tracer_conc=L[i], preincubation=pre[i])
    out["fold_shift"] = fold
    out["fold_shift_low"] = np.fmin(f_lo, f_hi)
    out["fold_shift_high"] = np.fmax(f_lo, f_hi)
    out["corrected_affinity_M"] = value / fold
    out["kd_used_M"] = kd_used
    out["predicted_apparent_M"] = kd_used * fold  # what the assay should read after its incubation, given the kinetics
    out["simulated_as"] = np.where(comp, "competition", np.where(sat, "saturation", None))
    out["note"] = note
    out["min_incubation_s"] = t_min
    out["effective_incubation_s"] = np.where(ok, t_eff, np.nan)
    return out


# ----------------------------------------------------------------------------- compound summary
SUMMARY_COLUMNS = ["compound_id", "residence_time_s", "residence_time_low_s", "residence_time_high_s", "kinetic_measurement_id",
                   "n_kinetic_runs", "kinetics_conflict", "kinetics_basis", "worst_fold_shift", "worst_fold_shift_low",
                   "worst_fold_shift_high", "worst_potency_id", "worst_reading", "worst_corrected_affinity_M", "max_fold_shift",
                   "corrected_affinity_M"]


def summarise(compound_ids, kinetics: pd.DataFrame, readings: pd.DataFrame) -> pd.DataFrame:
    """One row per compound (:data:`SUMMARY_COLUMNS`): residence time and the worst reading.

    The worst reading is the one whose predicted fold lies farthest from 1 on
    a log scale (too weak or too potent); ``worst_reading`` names it
    (:func:`reading_label`).  ``max_fold_shift`` is the largest fold (kept for
    the frame contract), ``corrected_affinity_M`` the tightest corrected value.
    """
    s = pd.DataFrame({"compound_id": pd.Series(list(compound_ids))})
    k = kinetics.set_index("compound_id") if len(kinetics) else pd.DataFrame(columns=KINETICS_COLUMNS).set_index("compound_id")
    koff = s["compound_id"].map(k["koff_per_s"]).astype(float)
    s["residence_time_s"] = 1.0 / koff
    s["residence_time_low_s"] = 1.0 / s["compound_id"].map(k["koff_high_per_s"]).astype(float)
    s["residence_time_high_s"] = 1.0 / s["compound_id"].map(k["koff_low_per_s"]).astype(float)
    s["kinetic_measurement_id"] = s["compound_id"].map(k["kinetic_measurement_id"])
    s["n_kinetic_runs"] = s["compound_id"].map(k["n_runs"]).fillna(0).astype(int)
    s["kinetics_conflict"] = s["compound_id"].map(k["conflict"]).astype(object).fillna(False).astype(bool)
    s["kinetics_basis"] = s["compound_id"].map(k["kinetics_basis"])
    for c in SUMMARY_COLUMNS[8:]:
        s[c] = np.nan
    s["worst_reading"] = None
    r = readings[np.isfinite(_num(readings, "fold_shift"))] if len(readings) else readings
    if len(r):
        r = r.assign(_dev=np.abs(np.log(r["fold_shift"].astype(float))))
        worst = r.sort_values(["compound_id", "_dev", "potency_id"], ascending=[True, False, True], kind="mergesort").drop_duplicates("compound_id")
        w = worst.set_index("compound_id")
        s["worst_fold_shift"] = s["compound_id"].map(w["fold_shift"]).astype(float)
        s["worst_fold_shift_low"] = s["compound_id"].map(w["fold_shift_low"]).astype(float)
        s["worst_fold_shift_high"] = s["compound_id"].map(w["fold_shift_high"]).astype(float)
        s["worst_potency_id"] = s["compound_id"].map(w["potency_id"])
        labels = pd.Series([reading_label(a, ro, t, p) for a, ro, t, p in zip(w["assay"], w["readout"], w["incubation_s"], w["potency_id"])],
                           index=w.index, dtype=object)
        s["worst_reading"] = s["compound_id"].map(labels)
        s["worst_corrected_affinity_M"] = s["compound_id"].map(w["corrected_affinity_M"]).astype(float)
        g = r.groupby("compound_id")
        s["max_fold_shift"] = s["compound_id"].map(g["fold_shift"].max()).astype(float)
        s["corrected_affinity_M"] = s["compound_id"].map(g["corrected_affinity_M"].min()).astype(float)
    return s[SUMMARY_COLUMNS]


# ----------------------------------------------------------------------------- for the pages
def compound_evidence(result, compound_id: int) -> dict[str, Any]:
    """One compound's evidence as the grader saw it: ``{summary, kinetics, runs, readings}``.

    ``result`` is a :class:`~tracker.rules.grader.GradeResult`.  ``summary``: the
    compound's row of ``result.compounds`` as a dict; ``kinetics``: its
    selected kinetics (dict, or None); ``runs``: its kinetic runs (frame);
    ``readings``: its potency rows with :data:`READING_COLUMNS`.
    """
    summ = result.compounds[result.compounds["compound_id"] == compound_id]
    kin = result.kinetics[result.kinetics["compound_id"] == compound_id] if len(result.kinetics) else result.kinetics
    runs = result.kinetic_runs[result.kinetic_runs["compound_id"] == compound_id] if len(result.kinetic_runs) else result.kinetic_runs
    pot = result.potency[result.potency["compound_id"] == compound_id] if len(result.potency) else result.potency
    return {"summary": summ.iloc[0].to_dict() if len(summ) else {}, "kinetics": kin.iloc[0].to_dict() if len(kin) else None,
            "runs": runs.reset_index(drop=True), "readings": pot.reset_index(drop=True)}


def affinity_curve(kd: float, koff: float, incubations, reading: dict | None = None) -> pd.DataFrame:
    """Apparent affinity and fold against incubation for one compound, in the format of ``reading``.

    ``reading``: a potency row (dict) whose format, tracer and pre-incubation
    set the model (a fully described competition-binding reading: tracer
    competition; otherwise the one-step read).  Returns ``incubation_s``,
    ``apparent_M``, ``fold`` and ``model``.
    """
    t = np.asarray(incubations, dtype=float)
    r = reading or {}

    def f(name):
        try:
            v = float(r.get(name))
        except (TypeError, ValueError):
            return math.nan
        return v

    L, kd_t, rt_t, pre = f("tracer_conc_M"), f("tracer_kd_M"), f("tracer_residence_time_s"), f("preincubation_s")
    pre = pre if math.isfinite(pre) and pre > 0 else 0.0
    if r.get("format") == "competition-binding" and all(math.isfinite(v) and v > 0 for v in (L, kd_t, rt_t)):
        res = apparent_affinity(kd, koff, t, format="competition", tracer_kd=kd_t, tracer_koff=1.0 / rt_t, tracer_conc=L, preincubation=pre)
        model = "competition (this tracer)"
    else:
        res = apparent_affinity(kd, koff, t + pre)
        model = "one-step read"
    return pd.DataFrame({"incubation_s": t, "apparent_M": np.asarray(res.apparent, float), "fold": np.asarray(res.fold, float), "model": model})


def floor_of_series(kons, incubation_s: float) -> tuple[float | None, float | None, int]:
    """``(floor KD in M, median kon, n)``: ln2/(kon t) with the median of the series' measured kon."""
    k = np.asarray(kons, dtype=float)
    k = k[np.isfinite(k) & (k > 0)]
    if k.size == 0:
        return None, None, 0
    kon = float(np.median(k))
    return float(assay_floor(kon, incubation_s)), kon, int(k.size)


def engagement_summary(result, compound_id: int, *, n_doses: int | None = None, max_points: int = 700) -> dict[str, Any] | None:
    """Engagement of one compound with exactly the inputs the grader's duration check used.

    Returns ``{kon, koff, route, cmax, tmax, half_life, threshold, threshold_is_default,
    dosing_interval, n_doses, regimen, target_half_life, duration_set_by, metrics: {...}, series: {...}}``
    or None when the compound lacks kinetics, affinity or PK.  The threshold is the program's,
    else the rule configuration's default (as in the finding).  Regimen and numbers come from
    :func:`tracker.rules.engagement.compound_engagement`, the duration check's own function:
    one dose, or with a dosing interval the regimen at steady state (``n_doses`` is kept for
    callers and ignored).
    """
    from .engagement import compound_engagement

    d = result.duration
    if d is None or d.empty:
        return None
    row = d[d["compound_id"] == compound_id]
    if row.empty:
        return None
    r = row.iloc[0]

    def g(name):
        try:
            v = float(r.get(name))
        except (TypeError, ValueError):
            return math.nan
        return v

    kon, koff, cmax, hl, tmax = g("kon_per_M_s"), g("koff_per_s"), g("free_cmax_M"), g("half_life_s"), g("tmax_s")
    route = r.get("route") if isinstance(r.get("route"), str) else ""
    if not (kon > 0 and koff > 0 and cmax > 0 and hl > 0) or route not in ("oral", "iv") or (route == "oral" and not tmax > 0):
        return None
    thr_p = g("engagement_threshold")
    thr = thr_p if math.isfinite(thr_p) else g("default_engagement_threshold")
    if not math.isfinite(thr):
        thr = 0.5
    tau = g("dosing_interval_s")
    tau = tau if math.isfinite(tau) and tau > 0 else None
    tm = tmax if route == "oral" else None
    fac = g("bound_target_degradation_factor")
    ce = compound_engagement(kon, koff, {"route": route, "free_cmax_M": cmax, "half_life_s": hl, "tmax_s": tm, "dosing_interval_s": tau},
                             {"engagement_threshold": thr_p, "dosing_interval_s": tau, "target_half_life_s": g("target_half_life_s")},
                             default_threshold=thr, bound_degradation_factor=fac if math.isfinite(fac) else 1.0, max_points=max_points)
    metrics = {k: (None if not math.isfinite(ce[k]) else ce[k]) for k in ("onset_s", "offset_s", "duration_above_threshold_s",
                                                                         "peak_occupancy", "trough_occupancy")}
    thl = ce["target_half_life_s"]
    return {"kon": kon, "koff": koff, "route": route, "cmax": cmax, "tmax": tm, "half_life": hl, "threshold": thr,
            "threshold_is_default": not math.isfinite(thr_p), "dosing_interval": tau, "n_doses": None if tau else 1,
            "regimen": ce["regimen"], "target_half_life": None if not math.isfinite(thl) else thl,
            "duration_set_by": ce["duration_set_by"], "metrics": metrics, "series": ce["timeseries"]}
