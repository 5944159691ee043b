"""Engagement under PK as the rules judge it: one regimen, one set of numbers, for the grader and every page.

The ``duration-mismatch`` rule, the dashboard's engagement tiles and chart and
the review pack all take the regimen and the numbers from here, so what a page
shows is what the finding judged.

Regimen (:func:`dosing_interval`): the program's dosing interval, else the PK
study's.  Without one a single dose is judged.  With one the *regimen* is
judged, never one dose:

* ``onset_s``: first time occupancy reaches the threshold from the first dose
  (repeat dosing at the interval, up to :data:`ONSET_DOSES` doses);
* ``peak_occupancy``: the highest occupancy at steady state;
* ``duration_above_threshold_s``: time above threshold per dosing interval
  at steady state;
* ``trough_occupancy``: the steady-state trough;
* ``offset_s``: after the last dose of a regimen at steady state, the last
  time occupancy is above threshold (measured from that dose).

Single dose: onset, peak, total time above threshold and offset after the dose
(``trough_occupancy`` NaN).  The metric names are those of
:class:`tracker.kinetics.engagement.EngagementMetrics`, so the findings' JSON
keys keep their names; the ``regimen`` label says which regimen they describe.

Target turnover: with a program's ``target_half_life`` the simulation
includes target synthesis and degradation (bound target degraded at
``bound_target_degradation_factor`` x the free rate, rule configuration).
:func:`duration_set_by` says whether turnover or dissociation limits the
duration (turnover once the residence time exceeds the bound target's half-life).

Public functions (stable names; :mod:`tracker.rules.evidence` re-exports them):
``regimen_engagement`` (vectorised, the grader), ``compound_engagement`` (one
compound: numbers and chart series, the pages), ``dosing_interval``,
``regimen_label``, ``duration_set_by``.

Simulations are decision support, not dosing advice; defer to qualified
pharmacologists.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..kinetics.engagement import engagement_metrics, engagement_timeseries
from ..fmt import duration as fmt_time

__all__ = ["ONSET_DOSES", "REGIMEN_METRICS", "dosing_interval", "regimen_label", "duration_set_by", "regimen_engagement",
           "compound_engagement"]

#: doses simulated to find the onset when the first dose does not reach the threshold within one interval
#: (design choice: 20 intervals cover > 95 % of accumulation for any half-life up to ~6.5 intervals)
ONSET_DOSES = 20

#: the numbers a regimen is judged on (EngagementMetrics names)
REGIMEN_METRICS = ("onset_s", "offset_s", "duration_above_threshold_s", "peak_occupancy", "trough_occupancy")


def _num(v: Any) -> float:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return math.nan
    return x if math.isfinite(x) and x > 0 else math.nan


def dosing_interval(program_interval: ArrayLike, pk_interval: ArrayLike) -> Any:
    """The interval judged: the program's, else the PK study's (NaN = single dose); arrays or scalars."""
    p = np.asarray(program_interval, dtype=float)
    k = np.asarray(pk_interval, dtype=float)
    p = np.where(np.isfinite(p) & (p > 0), p, np.nan)
    k = np.where(np.isfinite(k) & (k > 0), k, np.nan)
    out = np.where(np.isfinite(p), p, k)
    return float(out) if out.ndim == 0 else out


def regimen_label(tau: Any) -> str:
    """``one dose`` or ``steady state on a 24 h dosing interval``."""
    t = _num(tau)
    return "one dose" if math.isnan(t) else f"steady state on a {fmt_time(t)} dosing interval"


def duration_set_by(koff: ArrayLike, target_half_life: ArrayLike | None, bound_degradation_factor: ArrayLike = 1.0) -> Any:
    """``"turnover"`` where the residence time exceeds the bound target's half-life (t1/2 / factor),
    ``"dissociation"`` where it does not, ``None`` without a target half-life (object array or scalar)."""
    koff_a = np.asarray(koff, dtype=float)
    thl = np.asarray(np.nan if target_half_life is None else target_half_life, dtype=float)
    fac = np.asarray(bound_degradation_factor, dtype=float)
    koff_a, thl, fac = np.broadcast_arrays(koff_a, thl, fac)
    known = np.isfinite(thl) & (thl > 0) & np.isfinite(koff_a) & (koff_a > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        bound_hl = np.where(fac > 0, thl / np.where(fac > 0, fac, 1.0), np.inf)
        turnover = known & (1.0 / koff_a > bound_hl)
    out = np.full(koff_a.shape, None, dtype=object)
    out[known] = "dissociation"
    out[turnover] = "turnover"
    return out.item() if out.ndim == 0 else out


def regimen_engagement(kon: ArrayLike, koff: ArrayLike, route: ArrayLike, cmax: ArrayLike, tmax: ArrayLike, half_life: ArrayLike,
                       threshold: ArrayLike, dosing_interval_s: ArrayLike, *, target_half_life: ArrayLike | None = None,
                       bound_degradation_factor: ArrayLike = 1.0, metrics: Sequence[str] = REGIMEN_METRICS) -> dict[str, NDArray[Any]]:
    """The judged engagement numbers for arrays of compounds (SI units; see the module docstring).

    ``dosing_interval_s``: NaN where a single dose is judged.  ``metrics``: a
    subset of :data:`REGIMEN_METRICS` (the rest NaN).  Returns arrays keyed by
    the metric names, plus ``regimen`` (an object array of labels).
    """
    kon, koff, route, cmax, tmax, hl, thr, tau = (np.atleast_1d(np.asarray(a)) for a in
                                                  (kon, koff, route, cmax, tmax, half_life, threshold, dosing_interval_s))
    kon, koff, cmax, tmax, hl, thr, tau = (a.astype(float) for a in (kon, koff, cmax, tmax, hl, thr, tau))
    kon, koff, route, cmax, tmax, hl, thr, tau = np.broadcast_arrays(kon, koff, route, cmax, tmax, hl, thr, tau)
    n = kon.size
    thl = np.broadcast_to(np.asarray(np.nan if target_half_life is None else target_half_life, dtype=float), (n,))
    fac = np.broadcast_to(np.asarray(bound_degradation_factor, dtype=float), (n,))
    wanted = set(metrics)
    out = {k: np.full(n, np.nan) for k in REGIMEN_METRICS}
    out["regimen"] = np.array([regimen_label(t) for t in tau], dtype=object)
    tmax_o = np.where(route == "oral", tmax, np.nan)
    single = ~np.isfinite(tau)

    def em(idx: NDArray[np.intp], **kw: Any) -> Any:
        return engagement_metrics(kon[idx], koff[idx], route[idx], cmax[idx], tmax_o[idx], hl[idx], thr[idx],
                                  target_half_life=thl[idx], bound_degradation_factor=fac[idx], **kw)

    if single.any():
        idx = np.nonzero(single)[0]
        m = em(idx, metrics=[k for k in REGIMEN_METRICS if k in wanted and k != "trough_occupancy"] or ["onset_s"])
        for k in REGIMEN_METRICS:
            if k in wanted and k != "trough_occupancy":
                out[k][idx] = m[k]
    if (~single).any():
        idx = np.nonzero(~single)[0]
        steady = {"peak_occupancy": "steady_peak_occupancy", "duration_above_threshold_s": "steady_time_above_s",
                  "offset_s": "steady_offset_s", "trough_occupancy": "trough_occupancy"}
        need = [steady[k] for k in steady if k in wanted]
        if "onset_s" in wanted:
            need.append("onset_s")
        m = em(idx, dosing_interval=tau[idx], metrics=need)
        for k, name in steady.items():
            if k in wanted:
                out[k][idx] = m[name]
        if "onset_s" in wanted:
            onset = np.asarray(m["onset_s"], dtype=float).copy()
            # the first dose's onset holds if it comes before the second dose; else simulate the doses
            late = ~(onset < tau[idx])
            if late.any():
                j = idx[late]
                more = em(j, dosing_interval=tau[j], n_doses=ONSET_DOSES, metrics=["onset_s"])
                onset[late] = more["onset_s"]
            out["onset_s"][idx] = onset
    return out


def compound_engagement(kon: float, koff: float, pk: Mapping[str, Any], program: Mapping[str, Any] | None = None, *,
                        default_threshold: float = 0.5, bound_degradation_factor: float = 1.0,
                        series: bool = True, max_points: int = 700) -> dict[str, Any]:
    """One compound's judged engagement: the regimen, its numbers and (``series``) the chart series.

    ``pk``: ``route``, ``free_cmax_M``, ``half_life_s``, ``tmax_s`` (oral),
    ``dosing_interval_s`` (optional); ``program``: ``engagement_threshold``,
    ``dosing_interval_s``, ``target_half_life_s`` (all optional).  The
    threshold is the program's, else ``default_threshold`` (the rule
    configuration's ``default_engagement_threshold``).  Returns ``regimen``
    (label), ``dosing_interval_s`` (NaN for one dose), ``threshold``,
    ``threshold_is_default``, ``target_half_life_s``, ``duration_set_by``,
    the :data:`REGIMEN_METRICS` as floats (NaN undefined) and, with
    ``series``, ``timeseries`` (``t_s``, ``conc_M``, ``occupancy``,
    ``occupancy_rapid``: one dose, or one steady-state interval then the
    last dose and washout).
    """
    program = program or {}
    thr_p = _num(program.get("engagement_threshold"))
    thr = thr_p if not math.isnan(thr_p) and thr_p < 1 else float(default_threshold)
    tau = dosing_interval(_num(program.get("dosing_interval_s")), _num(pk.get("dosing_interval_s")))
    thl = _num(program.get("target_half_life_s"))
    route = str(pk.get("route"))
    tmax = _num(pk.get("tmax_s"))
    args = (float(kon), float(koff), route, float(pk["free_cmax_M"]), tmax, float(pk["half_life_s"]))
    met = regimen_engagement(*args, thr, tau, target_half_life=thl, bound_degradation_factor=bound_degradation_factor)
    out: dict[str, Any] = {
        "regimen": regimen_label(tau), "dosing_interval_s": tau, "threshold": thr, "threshold_is_default": math.isnan(thr_p),
        "target_half_life_s": thl, "duration_set_by": duration_set_by(koff, thl, bound_degradation_factor),
        **{k: float(met[k][0]) for k in REGIMEN_METRICS},
    }
    if series:
        steady = not math.isnan(tau)
        out["timeseries"] = engagement_timeseries(
            *args[:4], None if route != "oral" else tmax, args[5], tau if steady else None, 1, threshold=thr,
            max_points=max_points, steady_state=steady, target_half_life=None if math.isnan(thl) else thl,
            bound_degradation_factor=bound_degradation_factor)
    return out
