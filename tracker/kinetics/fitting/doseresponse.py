"""Dose-response fits: four-parameter logistic, the Ki shift, insurmountability, Morrison tight binding."""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from ...errors import FitError
from ...fmt import conc as fmt_conc
from .. import equations as eq
from ..equations import LN2, cheng_prusoff_ki
from .common import (
    RT_LOWER_BOUND_FRACTION,
    TREND_P,
    _trends,
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
    check_weights,
)
from .intervals import _ci, _intervals, _kd_ci, _recip_ci, _tq
from .results import FitResult, _Builder


# ============================================================== dose-response helpers
def _dose_trend(x: FloatArray, y: FloatArray) -> int:
    """+1 / -1 / 0: the signal rises / falls / does neither with dose (Spearman, log dose, p < TREND_P)."""
    return _trends(x, y, np.zeros(x.size, dtype=np.intp), 1)[0]


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
    weights: str = "none",
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

    Doses in M, incubation times in s; replicate points at one incubation are
    pooled into its curve; ``weights`` is ``none``, ``proportional`` or
    ``poisson``.  Raises :class:`FitError` when an incubation's curve shows no
    concentration-response (Spearman p >= 0.01) or the curves run in opposite
    directions.

    Warnings: ``not-at-equilibrium``, ``reverse-shift``, ``ic50-outside-range``,
    ``hill-not-one``, ``at-limit``, ``ci-open``.
    """
    method = "ki-shift"
    check_weights(weights)
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
    b = _Builder(method, weights)
    directions = []
    for tv in times:
        sel = inc == tv
        lab = lab_of[tv]
        _min_points(int(sel.sum()), 4, f"{method} (incubation {lab})")
        _not_constant(y[sel], f"{method} (incubation {lab})")
        d = _dose_trend(x[sel], y[sel])
        if d == 0:
            raise FitError(f"ki-shift: no concentration-response at incubation {lab} (Spearman test p >= {TREND_P:g}): "
                           "an IC50 cannot be fitted; extend the dose range or check the plate map")
        directions.append(d)
    if len(set(directions)) > 1:
        raise FitError("ki-shift: the curves run in opposite directions (one falls with dose, another rises): check "
                       "the signal columns; a Ki shift compares one readout across incubation times")
    for tv in times:
        sel = inc == tv
        fits.append(_logistic_fit(x[sel], y[sel], lab_of[tv], max_nfev, weights))
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
    intervals: str = "auto", max_nfev: int | None = None, strict: bool = True, weights: str = "none",
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

    Doses in M; ``weights`` is ``none``, ``proportional`` or ``poisson``.
    Raises :class:`FitError` when the control (agonist alone) does not rise
    with dose: a falling curve is an inhibition curve (ki-shift or morrison).
    """
    method = "insurmountability"
    check_weights(weights)
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
    d_ctrl = _dose_trend(x[idx == 0], y[idx == 0])
    if d_ctrl < 0:
        raise FitError(f"insurmountability: the control curve {curves[0].label!r} falls with dose, so it is not an "
                       "agonist concentration-response; likely method: ki-shift or morrison (inhibition curves)")
    if d_ctrl == 0:
        raise FitError(f"insurmountability: the control curve {curves[0].label!r} shows no response to the agonist "
                       f"(Spearman test p >= {TREND_P:g}): there is no maximum to compare")
    singles = []
    for i, c in enumerate(curves):
        sel = idx == i
        f = _logistic_fit(x[sel], y[sel], c.label, max_nfev, weights)
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
    prob = _Problem("agonist-emax-fraction", ps, x, y, idx, curves, weights=weights)
    fit = _run(prob, None, max_nfev)
    b = _Builder(method, weights)
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




# ============================================================== Morrison
MORRISON_TITRATION = 0.01  # Kapp below 1% of the enzyme: the curve is a titration (IC50 ~ E/2; common practice)
MORRISON_NOT_TIGHT = 0.1  # enzyme below 10% of Kapp: IC50 ~ Kapp, the ordinary analysis suffices (common practice)


def fit_morrison(
    conc: npt.ArrayLike, signal: npt.ArrayLike, enzyme_conc: float, *, substrate_conc: float | None = None,
    km: float | None = None, fit_bottom: bool = True, weights: str = "none", intervals: str = "auto",
    max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Tight-binding dose-response: Kapp from the Morrison equation, given the active enzyme concentration.

    Activity = bottom + (top - bottom)*v/v0 with
    v/v0 = 1 - [(E + I + Kapp) - sqrt((E + I + Kapp)^2 - 4*E*I)]/(2*E)
    (Morrison 1969, Biochim Biophys Acta 185:269-286; volume and pages from
    memory), I the total inhibitor and E the active enzyme.  When inhibitor
    binding depletes free inhibitor (E comparable to Kapp) the ordinary IC50
    overstates Ki; the Morrison fit does not.  ``ic50`` = Kapp + E/2 (Copeland
    et al. 1995, Bioorg Med Chem Lett 5:1947-1952).  With the substrate
    concentration and Km of a competitive inhibitor, ``ki`` = Kapp/(1 + S/Km)
    (common practice for a competitive mechanism).

    Parameters
    ----------
    conc : array_like
        Total inhibitor concentration per well, M.
    signal : array_like
        Enzyme activity (rate or end-point signal), any unit.
    enzyme_conc : float
        Active enzyme concentration in the assay, M.
    substrate_conc, km : float, optional
        Substrate concentration and its Km, M (both, for ``ki``).
    fit_bottom : bool
        Fit a background floor (``True``) or hold it at zero.
    weights : {"none", "proportional", "poisson"}
        Noise model.

    Returns
    -------
    FitResult
        ``kapp`` (M), ``ic50`` (M), optionally ``ki`` (M), with 95% intervals.

    Raises
    ------
    FitError
        When the enzyme concentration is not positive, or activity rises with
        the inhibitor (an activator or agonist curve) or does not change.

    Warnings
    --------
    ``titration``
        Kapp below 1% of the enzyme: the curve measures the enzyme (IC50 ~ E/2),
        so Kapp is poorly determined; lower the enzyme concentration.
    ``not-tight-binding``
        the enzyme is below 10% of Kapp: the ordinary IC50 gives the same
        answer.
    ``enzyme-conc-matters``, ``at-limit``, ``ci-open``.
    """
    method = "morrison"
    check_weights(weights)
    if enzyme_conc is None or not (np.isfinite(enzyme_conc) and enzyme_conc > 0):
        raise FitError("morrison needs the active enzyme concentration (a positive number, M)")
    if (substrate_conc is None) != (km is None):
        raise FitError("the Ki conversion needs both the substrate concentration and Km")
    if km is not None and substrate_conc is not None and not (km > 0 and substrate_conc >= 0):
        raise FitError("Km must be positive and the substrate concentration not negative")
    E = float(enzyme_conc)
    x, y = _arrays(conc, signal, "concentration")
    _min_points(x.size, 2 + int(fit_bottom), method)
    _not_constant(y, method)
    d = _dose_trend(x, y)
    if d > 0:
        raise FitError("morrison: activity rises with inhibitor concentration, so this is not an inhibition curve "
                       "(an activator or agonist curve); likely method: insurmountability for agonist curves")
    if d == 0:
        raise FitError(f"morrison: activity does not fall with inhibitor concentration (Spearman test p >= "
                       f"{TREND_P:g}): there is no inhibition to fit")
    xp = x[x > 0]
    if xp.size < 2:
        raise FitError("morrison needs at least two positive inhibitor concentrations")
    curves = (CurveInfo("all"),)
    idx = np.zeros(x.size, dtype=np.intp)
    ctx = {"enzyme_conc": E}

    def design(kapp: float) -> FloatArray:
        f = eq.morrison_fraction(x, E, kapp)
        return np.column_stack([f, 1.0 - f]) if fit_bottom else f[:, None]

    grid = np.geomspace(max(float(xp.min()) / 100.0, IC50_LIMITS[0] * 10), float(xp.max()) * 10.0, 40)
    scored = sorted((_lin(design(float(k)), y)[1], float(k)) for k in grid)
    k0 = scored[0][1]
    c0 = _lin(design(k0), y)[0]
    ps = [Param("kapp", k0, True, *IC50_LIMITS, key=True), Param("top", float(c0[0])),
          Param("bottom", float(c0[1]) if fit_bottom else 0.0, fixed=not fit_bottom)]

    def assemble(c: FloatArray) -> Params:
        return {"top": float(c[0]), "bottom": float(c[1])} if fit_bottom else {"top": float(c[0])}

    prob = _Problem("morrison", ps, x, y, idx, curves, ctx, weights=weights)
    fit = _run_vp(prob, ["kapp"], lambda p: design(p["kapp"]), assemble, [[math.log10(k)] for _, k in scored[:3]],
                  max_nfev)
    b = _Builder(method, weights)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    kapp = fit.value("kapp")
    kci = _ci(fit, ivs, "kapp")
    kind = ivs["kapp"].kind
    b.put("kapp", kapp, kci, kind)
    b.put("ic50", kapp + E / 2.0, (kci[0] + E / 2.0, kci[1] + E / 2.0), kind)
    if substrate_conc is not None and km is not None:
        factor = 1.0 + substrate_conc / km
        b.put("ki", kapp / factor, (kci[0] / factor, kci[1] / factor), kind)
        b.extras["ki_conversion"] = "competitive: Ki = Kapp/(1 + S/Km)"
    b.extras["enzyme_conc_M"] = E
    if kapp < MORRISON_TITRATION * E:
        b.warn("titration", f"Kapp ({fmt_conc(kapp)}) is below 1% of the enzyme concentration ({fmt_conc(E)}): the curve "
               "titrates the enzyme (IC50 ~ E/2), so Kapp is poorly determined; lower the enzyme concentration")
    elif E < MORRISON_NOT_TIGHT * kapp:
        b.warn("not-tight-binding", f"the enzyme ({fmt_conc(E)}) is below 10% of Kapp ({fmt_conc(kapp)}): tight binding "
               "does not distort this IC50, and the ordinary analysis gives the same answer")
    else:
        b.warn("enzyme-conc-matters", f"the enzyme concentration ({fmt_conc(E)}) is comparable to Kapp ({fmt_conc(kapp)}): "
               "Kapp depends on it being the active enzyme concentration; an error in E shifts Kapp (IC50 = Kapp + "
               "E/2, Copeland et al. 1995)")
    return b.result([fit])
