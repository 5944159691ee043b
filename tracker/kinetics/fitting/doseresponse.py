"""Dose-response fits: four-parameter logistic, the Ki shift, insurmountability."""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from ...errors import FitError
from .. import equations as eq
from ..equations import LN2, cheng_prusoff_ki
from .common import (
    RT_LOWER_BOUND_FRACTION,
    _arrays,
    _check_strict,
    _group,
    _ind,
    _kon_check,
    _min_points,
    _not_constant,
    _rate_grid,
    _rate_summary,
    _rt_lower_bound,
)
from .curves import CurveInfo
from .engine import (
    HILL_LIMITS,
    IC50_LIMITS,
    KOFF_LIMITS,
    KON_LIMITS,
    FloatArray,
    IntArray,
    Param,
    Params,
    _Fit,
    _lin,
    _Problem,
    _run,
    _run_vp,
)
from .intervals import _ci, _intervals, _kd_ci, _recip_ci, _tq
from .results import FitResult, _Builder


# ============================================================== dose-response helpers
def _logistic_fit(x: FloatArray, y: FloatArray, label: str, max_nfev: int | None = None,
                  weights: str = "none") -> _Fit:
    xp = x[x > 0]
    if xp.size < 2:
        raise FitError(f"curve {label!r} needs at least two positive doses")
    lo, hi = float(xp.min()), float(xp.max())
    grid = np.geomspace(lo / 10, hi * 10, 30)
    cand: list[tuple[float, float, float, FloatArray]] = []
    for h in (0.7, 1.0, 1.5):
        for c in grid:
            s = 1.0 / (1.0 + (x / c) ** h)  # top weight; bottom weight = 1 - s
            coef, ssr = _lin(np.column_stack([1 - s, s]), y)
            cand.append((ssr, float(c), h, coef))
    cand.sort(key=lambda c: c[0])
    _, c0, h0, co0 = cand[0]
    bot, top = float(co0[0]), float(co0[1])
    curves = (CurveInfo(label),)
    ps = [Param(f"bottom[{label}]", bot), Param(f"top[{label}]", top),
          Param(f"ic50[{label}]", c0, True, *IC50_LIMITS, key=True), Param(f"hill[{label}]", h0, False, *HILL_LIMITS)]
    prob = _Problem("logistic4", ps, x, y, np.zeros(x.size, dtype=np.intp), curves, weights=weights)

    def l_design(p: Params) -> FloatArray:
        s_ = 1.0 / (1.0 + (x / p[f"ic50[{label}]"]) ** p[f"hill[{label}]"])
        return np.column_stack([1 - s_, s_])

    return _run_vp(prob, [f"ic50[{label}]", f"hill[{label}]"], l_design,
                   lambda c: {f"bottom[{label}]": float(c[0]), f"top[{label}]": float(c[1])},
                   [[math.log10(c), h] for _, c, h, _co in cand[:3]], max_nfev)


# ============================================================== Ki shift
def fit_ki_shift(
    dose: npt.ArrayLike, signal: npt.ArrayLike, incubation: npt.ArrayLike, *, tracer_conc: float | None = None, tracer_kd: float | None = None,
    labels: npt.ArrayLike | None = None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Potency at two (or more) incubation times: the Ki-shift ratio.

    Each incubation's dose-response is fitted alone with the four-parameter
    logistic (DeLean, Munson & Rodbard 1978, from memory).  ``ki_shift_ratio``
    = IC50(shortest)/IC50(longest); > 1 means the compound looks weaker at the
    short incubation, the signature of slow binding that had not reached
    equilibrium.  Its 95% interval is the delta method on the log10 IC50s
    (independent fits, Welch-Satterthwaite degrees of freedom).  With the
    tracer concentration and KD, each IC50 becomes a Ki by Cheng & Prusoff
    (1973, Biochem Pharmacol 22:3099), which leaves the ratio unchanged.

    Warnings: ``not-at-equilibrium``, ``reverse-shift``, ``ic50-outside-range``,
    ``hill-not-one``, ``at-limit``, ``ci-open``.
    """
    method = "ki-shift"
    x, y = _arrays(dose, signal, "concentration")
    inc = np.broadcast_to(np.asarray(incubation, float), x.shape)
    if not np.all(np.isfinite(inc) & (inc > 0)):
        raise FitError("incubation times must be positive numbers")
    if (tracer_conc is None) != (tracer_kd is None):
        raise FitError("Cheng-Prusoff needs both the tracer concentration and the tracer KD")
    times = np.unique(inc)
    if times.size < 2:
        raise FitError("a Ki shift needs dose-response curves at two or more incubation times")
    lab_of = {}
    for tv in times:
        sel = inc == tv
        given = None
        if labels is not None:
            u = np.unique(np.asarray(labels, object)[sel])
            given = str(u[0]) if u.size == 1 else None
        lab_of[tv] = given or _time_label(tv)
    fits = []
    b = _Builder(method)
    for tv in times:
        sel = inc == tv
        lab = lab_of[tv]
        _min_points(int(sel.sum()), 4, f"{method} (incubation {lab})")
        _not_constant(y[sel], f"{method} (incubation {lab})")
        fits.append(_logistic_fit(x[sel], y[sel], lab, max_nfev))
    _check_strict(fits, strict, b)
    per = []
    for tv, fit in zip(times, fits):
        lab = lab_of[tv]
        ivs = _intervals(fit, intervals)
        b.put_params(fit, ivs)
        b.bound_warnings(fit)
        name = f"ic50[{lab}]"
        ci = _ci(fit, ivs, name)
        iv = ivs[name]
        j = fit.prob.names.index(name)
        if iv.kind == "covariance" or not (np.isfinite(iv.lo) and np.isfinite(iv.hi)):
            jf = list(fit.prob.free).index(j)
            se = math.sqrt(fit.cov[jf, jf]) if fit.cov is not None else np.nan
        else:
            se = (iv.hi - iv.lo) / (2 * _tq(fit.dof))
        per.append((tv, lab, fit, fit.value(name), ci, se, iv.kind))
        xs = x[inc == tv]
        xp = xs[xs > 0]
        if not (xp.min() <= fit.value(name) <= xp.max()):
            b.warn("ic50-outside-range", f"IC50 at incubation {lab} ({fit.value(name):.3g} M) lies outside the tested "
                   "doses: it is extrapolated")
        if tracer_conc is not None and tracer_kd is not None:
            ki = float(cheng_prusoff_ki(fit.value(name), tracer_conc, tracer_kd))
            kci = tuple(float(cheng_prusoff_ki(v, tracer_conc, tracer_kd)) for v in ci)
            b.put(f"ki[{lab}]", ki, kci, iv.kind)
            hname = f"hill[{lab}]"
            hci = _ci(fit, ivs, hname)
            if np.all(np.isfinite(hci)) and not (hci[0] <= 1.0 <= hci[1]):
                b.warn("hill-not-one", f"Hill slope at {lab} is {fit.value(hname):.2f} (95% CI {hci[0]:.2f}-"
                       f"{hci[1]:.2f}): Cheng-Prusoff assumes slope 1, so its Ki is approximate")
    short, long_ = per[0], per[-1]
    lr = math.log10(short[3]) - math.log10(long_[3])
    v1, v2 = short[5] ** 2, long_[5] ** 2
    d1, d2 = short[2].dof, long_[2].dof
    if np.isfinite(v1 + v2) and v1 + v2 > 0:
        nu = (v1 + v2) ** 2 / ((v1**2 / d1 if d1 > 0 else np.inf) + (v2**2 / d2 if d2 > 0 else np.inf))
        half = _tq(int(max(1, math.floor(nu)))) * math.sqrt(v1 + v2)
        rci = (10 ** (lr - half), 10 ** (lr + half))
    else:
        rci = (np.nan, np.nan)
    kind = "profile" if "profile" in (short[6], long_[6]) else "covariance"
    b.put("ki_shift_ratio", 10**lr, rci, kind)
    b.extras.update({"incubation_short_s": short[0], "incubation_long_s": long_[0],
                     "incubations_s": [p[0] for p in per], "labels": [p[1] for p in per]})
    if tracer_conc is not None and tracer_kd is not None:
        ki_long = float(cheng_prusoff_ki(long_[3], tracer_conc, tracer_kd))
        b.put("ki", ki_long, tuple(float(cheng_prusoff_ki(v, tracer_conc, tracer_kd)) for v in long_[4]), long_[6])
    if np.isfinite(rci[0]) and rci[0] > 1.0:
        b.warn("not-at-equilibrium", f"IC50 after {short[1]} is {10 ** lr:.2g}x the value after {long_[1]}: "
               "binding had not reached equilibrium at the short incubation (slow binding); potency from short "
               "incubations underestimates affinity, which can mean unexpected target coverage and "
               "mechanism-based toxicity; use the longest incubation and measure koff")
    elif np.isfinite(rci[1]) and rci[1] < 1.0:
        b.warn("reverse-shift", f"the compound looks stronger after {short[1]} than after {long_[1]}: check "
               "compound stability, tracer equilibration or time-dependent signal loss")
    return b.result(fits)


def _time_label(s: float) -> str:
    from ...fmt import duration

    return duration(float(s))


# ============================================================== insurmountability
def fit_insurmountability(
    dose: npt.ArrayLike, response: npt.ArrayLike, curve: npt.ArrayLike | None, *, control_label: str = "control", insurmountable_below: float = 0.9,
    intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Agonist curves without (``control_label``) and with antagonist: fraction of Emax remaining.

    Global fit: baseline shared; the control reaches baseline + span; each
    antagonist curve reaches baseline + fraction*span, with its own EC50 and
    Hill slope.  ``max_response_fraction`` is the lowest fraction (the most
    depressed curve) with its 95% interval; each curve's is in
    ``fraction[label]``.  A depressed maximum after pre-incubation is the
    signature of a slowly dissociating antagonist read before re-equilibration
    (hemi-equilibrium; Paton & Rang 1965, Kenakin, Jenkinson & Watson 2006, from
    memory), but receptor reserve can hide it and allosteric modulators can
    also be insurmountable: evidence of slow dissociation, not proof.

    Warnings: ``insurmountable`` (upper 95% limit below 1 and the fraction below
    ``insurmountable_below``), ``emax-slightly-depressed`` (significant but
    within that margin), ``emax-not-reached``, ``at-limit``, ``ci-open``.
    """
    method = "insurmountability"
    x, y = _arrays(dose, response, "concentration")
    if curve is None:
        raise FitError(f"insurmountability needs curve labels, one of them {control_label!r}")
    _not_constant(y, method)
    curves, idx = _group(x.size, curve, None, control_label)
    ctrl = [i for i, c in enumerate(curves) if c.role == "control"]
    ants = [i for i, c in enumerate(curves) if c.role != "control"]
    if len(ctrl) != 1:
        raise FitError(f"insurmountability needs exactly one curve labelled {control_label!r} (agonist alone)")
    if not ants:
        raise FitError("insurmountability needs at least one agonist curve with antagonist")
    ci_ = ctrl[0]
    order = [ci_] + ants
    curves = tuple(curves[i] for i in order)
    remap = np.empty(len(order), int)
    remap[order] = np.arange(len(order))
    idx = remap[idx]
    _min_points(x.size, 2 + 3 * len(curves) - 1, method, idx, per_curve=4)
    singles = []
    for i, c in enumerate(curves):
        sel = idx == i
        f = _logistic_fit(x[sel], y[sel], c.label, max_nfev)
        singles.append(f)
    base = float(np.mean([f.value(f"top[{c.label}]") for f, c in zip(singles, curves)]))
    emax_c = singles[0].value(f"bottom[{curves[0].label}]")
    span = emax_c - base if emax_c != base else float(np.ptp(y))
    ps = [Param("baseline", base), Param("span", span)]
    for f, c in zip(singles, curves):
        if c.role != "control":
            frac = (f.value(f"bottom[{c.label}]") - base) / span
            ps.append(Param(f"fraction[{c.label}]", float(np.clip(frac, -0.5, 2.0)), False, -1.0, 3.0, key=True))
        ps.append(Param(f"ec50[{c.label}]", f.value(f"ic50[{c.label}]"), True, *IC50_LIMITS))
        ps.append(Param(f"hill[{c.label}]", f.value(f"hill[{c.label}]"), False, *HILL_LIMITS))
    prob = _Problem("agonist-emax-fraction", ps, x, y, idx, curves)
    fit = _run(prob, None, max_nfev)
    b = _Builder(method)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    fr = [(fit.value(f"fraction[{curves[i].label}]"), curves[i].label) for i in range(1, len(curves))]
    fmin, lab = min(fr)
    name = f"fraction[{lab}]"
    b.put("max_response_fraction", fmin, _ci(fit, ivs, name), ivs[name].kind)
    b.extras["max_response_curve"] = lab
    ec_c = fit.value(f"ec50[{curves[0].label}]")
    for i in range(len(curves)):
        c = curves[i]
        ec = fit.value(f"ec50[{c.label}]")
        h = fit.value(f"hill[{c.label}]")
        if i:
            b.put(f"dose_ratio[{c.label}]", ec / ec_c)
        xmax = float(x[idx == i].max())
        reached = xmax**h / (xmax**h + ec**h)
        if reached < 0.8:
            b.warn("emax-not-reached", f"curve {c.label!r} reaches only {100 * reached:.0f}% of its fitted maximum at "
                   "the top dose: its Emax (and fraction) is extrapolated; extend the agonist doses")
    ci = b.ci95["max_response_fraction"]
    if np.isfinite(ci[1]) and ci[1] < 1.0 and fmin >= insurmountable_below:
        b.warn("emax-slightly-depressed", f"the maximal response with {lab} is {100 * fmin:.0f}% of control: "
               f"statistically lower, but within {100 * (1 - insurmountable_below):.0f}% of it")
    elif np.isfinite(ci[1]) and ci[1] < 1.0:
        b.warn("insurmountable", f"the maximal response falls to {100 * fmin:.0f}% of control with {lab}: consistent "
               "with slow antagonist dissociation (hemi-equilibrium); receptor reserve can hide this and allosteric "
               "modulators can also depress Emax, so it is evidence, not proof")
    return b.result([fit])


