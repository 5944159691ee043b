"""Association: one concentration (kobs) or a global kon/koff fit, with its cross-checks.

* the kobs line over per-curve fits, with its curvature checks (concave: two
  steps; convex: ligand depletion);
* ligand depletion: with ``receptor_conc`` the global model is the exact
  solution of second-order binding with depletion
  (:func:`tracker.kinetics.equations.depletion_association`); without it,
  plateaus that do not follow L/(L+KD) or a convex kobs plot raise the
  ``depletion-suspected`` warning;
* the two-state (induced-fit) model R + L <-> RL <-> RL* fitted as an
  alternative when kobs bends down, compared by an extra-sum-of-squares F test
  and AICc.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from ...errors import FitError
from ...fmt import conc, duration, rate1
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


# ============================================================== association
TWO_STATE_P = 0.01  # the two-state model is preferred at F test p < 0.01 ...
TWO_STATE_DAICC = 6.0  # ... and AICc lower by more than 6 (Burnham & Anderson: >~6 strong support; from memory)
DEPLETION_P = 0.01  # plateau / kobs-convexity tests


def _run_rise(t: FloatArray, y: FloatArray, max_nfev: int | None = None, weights: str = "none",
              idx: IntArray | None = None, curves: Sequence[CurveInfo] | None = None) -> _Fit:
    """One-phase rise Y = y0 + A*(1 - exp(-kobs*t)); several curves (replicates) share kobs and keep A, y0."""
    grid = _rate_grid(t)
    if curves is None or idx is None or len(curves) == 1:
        curves_, idx_ = (curves[0] if curves else CurveInfo("all"),), np.zeros(t.size, dtype=np.intp)

        def design(k: float) -> FloatArray:
            return np.column_stack([-np.expm1(-k * t), np.ones_like(t)])

        scored = sorted((_lin(design(float(k)), y)[1], float(k)) for k in grid)
        k0 = scored[0][1]
        c0 = _lin(design(k0), y)[0]
        ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True), Param("amplitude", float(c0[0])),
              Param("y0", float(c0[1]))]
        return _run_vp(_Problem("one-phase-association", ps, t, y, idx_, curves_, weights=weights), ["kobs"],
                       lambda p: design(p["kobs"]), lambda c: {"amplitude": float(c[0]), "y0": float(c[1])},
                       [[math.log10(k)] for _, k in scored[:3]], max_nfev)
    nc = len(curves)

    def design_n(k: float) -> FloatArray:
        e = -np.expm1(-k * t)
        return np.column_stack([_ind(idx, i) * e for i in range(nc)] + [_ind(idx, i) for i in range(nc)])

    scored = sorted((_lin(design_n(float(k)), y)[1], float(k)) for k in grid)
    k0 = scored[0][1]
    c0 = _lin(design_n(k0), y)[0]
    ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True)]
    ps += [Param(f"amplitude[{c.label}]", float(c0[i])) for i, c in enumerate(curves)]
    ps += [Param(f"y0[{c.label}]", float(c0[nc + i])) for i, c in enumerate(curves)]
    names = [q.name for q in ps[1:]]
    return _run_vp(_Problem("rise-per-curve", ps, t, y, idx, curves, weights=weights), ["kobs"],
                   lambda p: design_n(p["kobs"]), lambda c: dict(zip(names, map(float, c))),
                   [[math.log10(k)] for _, k in scored[:3]], max_nfev)


def _check_rising(t: FloatArray, y: FloatArray, idx: IntArray, curves: Sequence[CurveInfo]) -> None:
    trends = _trends(t, y, idx, len(curves))
    falling = [c.label for c, d in zip(curves, trends) if d < 0]
    if falling:
        which = "the signal" if len(curves) == 1 else f"curve {falling[0]!r}"
        raise FitError(f"association: {which} falls with time (Spearman test p < {TREND_P:g}), so this is not an "
                       "association; likely method: dissociation (or competition-kinetics when a competitor makes "
                       "tracer binding overshoot)")
    if not any(d > 0 for d in trends):
        raise FitError(f"association: no curve rises with time (Spearman test p >= {TREND_P:g}): there is no "
                       "binding onset to fit; check that time zero is the ligand addition, or sample earlier")


def fit_association(
    t: npt.ArrayLike, signal: npt.ArrayLike, conc: npt.ArrayLike | None = None, curve: npt.ArrayLike | None = None,
    *, koff: float | None = None, receptor_conc: float | None = None, weights: str = "none",
    two_state: bool = True, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Association time courses.

    One concentration: Y = y0 + A*(1 - exp(-kobs*t)) gives ``kobs``; replicate
    curves share kobs.  With a known ``koff`` (from a dissociation experiment)
    and the concentration L, ``kon`` = (kobs - koff)/L and ``kd`` = koff/kon.

    Several concentrations: a global fit of specific binding
    Y = baseline + Bmax*L/(L+KD)*(1 - exp(-(kon*L + koff)*t)) with kon, koff,
    Bmax and the baseline shared (``koff`` fixed when given).  As a cross-check
    each curve is also fitted alone and kobs is regressed on L (weighted line:
    slope kon, intercept koff; ``extras['kobs_line']``).

    With ``receptor_conc`` (total receptor R0, M) the global model accounts for
    ligand depletion: L is then the *total* ligand added and the bound complex
    follows the exact solution of dB/dt = kon*(R0 - B)*(L - B) - koff*B
    (:func:`tracker.kinetics.equations.depletion_association`); Y = baseline +
    Bmax*B/R0.

    Parameters
    ----------
    t : array_like
        Time since ligand addition, s.
    signal : array_like
        Bound signal (any unit).
    conc : array_like, optional
        Ligand concentration of each point's curve, M.
    curve : array_like, optional
        Curve label per point (replicates keep their own labels).
    koff : float, optional
        Known dissociation rate constant, 1/s (fixed in the fit).
    receptor_conc : float, optional
        Total receptor concentration, M: switches to the depletion-aware model.
    weights : {"none", "proportional", "poisson"}
        Noise model (see :mod:`tracker.kinetics.fitting.engine`).
    two_state : bool
        Fit the two-state (induced-fit) alternative when four or more
        concentrations are present.

    Returns
    -------
    FitResult
        ``kon`` (1/(M*s)), ``koff`` (1/s), ``kd`` (M), ``residence_time`` (s),
        ``half_life`` (s) or ``kobs`` (1/s), with 95% intervals.

    Raises
    ------
    FitError
        When a curve falls with time (a dissociation trace), no curve rises, or
        the data cannot be fitted.

    Warnings
    --------
    ``kobs-curved``
        the kobs-vs-L plot bends down: a saturating kobs = a + b*L/(K + L)
        beats the line (F test p < 0.01, four or more concentrations, K below
        3x the top concentration): a two-step (induced-fit) mechanism is
        likely and the one-step kon/koff are apparent values (Vauquelin 2016,
        Br J Pharmacol 173:1268-1285).
    ``two-state-preferred``
        the two-state model fits clearly better (``extras['two_state']``).
    ``depletion-suspected``
        without ``receptor_conc``: the plateaus do not follow L/(L+KD) (per-curve
        plateaus beat the shared Bmax, F test p < 0.01) or kobs rises faster
        than linearly at low L; give the receptor concentration.
    ``koff-intercept-poor``
        the intercept's interval includes zero; measure koff by dissociation.
    ``fast-vs-sampling``
        a curve is at equilibrium by its first reading; it is left out of the
        kobs line (the global fit still uses its plateau).
    ``kobs-only``, ``kobs-below-koff``, ``kon-above-practical``, ``at-limit``, ``ci-open``.
    """
    method = "association"
    check_weights(weights)
    t, y = _arrays(t, signal)
    _not_constant(y, method)
    if koff is not None and not (np.isfinite(koff) and koff > 0):
        raise FitError("a given koff must be a positive number (1/s)")
    if receptor_conc is not None and not (np.isfinite(receptor_conc) and receptor_conc > 0):
        raise FitError("the receptor concentration must be a positive number (M)")
    curves, idx = _group(t.size, curve, conc)
    concs = np.array([c.conc for c in curves])
    known = bool(np.all(np.isfinite(concs)))
    distinct = np.unique(concs[np.isfinite(concs)])
    _check_rising(t, y, idx, curves)
    b = _Builder(method, weights)
    if receptor_conc is not None:
        if not known:
            raise FitError("the depletion-aware association model needs the total ligand concentration of every "
                           "curve (concentration column)")
        if distinct.size < 2 and koff is None:
            raise FitError("the depletion-aware association model needs two or more concentrations, or a known "
                           "koff")
    if receptor_conc is None and (len(curves) == 1 or not known or distinct.size < 2):
        if len(curves) > 1 and not known:
            raise FitError("several association curves need a concentration column (ligand concentration per curve)")
        return _single_concentration(b, t, y, idx, curves, concs, koff, intervals, max_nfev, strict, weights)

    # ---- several concentrations: per-curve kobs, line, then the global fit
    per = []
    for i, c in enumerate(curves):
        sel = idx == i
        if not c.conc > 0 or sel.sum() < 5 or np.ptp(y[sel]) == 0:
            continue
        try:
            f_i = _run_rise(t[sel], y[sel], max_nfev, weights)
        except FitError:
            continue
        k_i = f_i.value("kobs")
        tpos = t[sel][t[sel] > 0]
        if tpos.size and k_i * tpos.min() > 3.0:
            b.warn("fast-vs-sampling", f"the curve at {c.conc:.3g} M is at equilibrium by the first reading "
                   f"(kobs ~ {k_i:.2g} /s): it adds only its plateau; sample faster to see its rise")
            continue
        if not f_i.cov_ok or bool(np.any(f_i.active)) or not np.isfinite(f_i.cov_of("kobs")):
            continue
        se = math.sqrt(f_i.cov_of("kobs")) * math.log(10) * k_i
        per.append((float(c.conc), k_i, se, c.label))
    line = _kobs_line(b, per)

    nfree = 3 + (koff is None)
    _min_points(t.size, nfree, method, idx, per_curve=3)
    fit = _global_fit(t, y, idx, curves, concs, koff, receptor_conc, weights, line, per, max_nfev)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    kon, kf = fit.value("kon"), fit.value("koff")
    kon_ci = _ci(fit, ivs, "kon")
    if koff is None:
        kf_ci, kind = _ci(fit, ivs, "koff"), ivs["koff"].kind
        _rate_summary(b, kf, kf_ci, kind)
        b.put("kd", kf / kon, *_kd_ci(fit, ivs))
    else:
        b.put("koff", kf)
        b.put("residence_time", 1.0 / kf)
        b.put("half_life", LN2 / kf)
        b.put("kd", kf / kon, _recip_ci(kon_ci, kf), ivs["kon"].kind)
    b.put("kon", kon, kon_ci, ivs["kon"].kind)
    _kon_check(b, kon)
    if line and koff is None and np.isfinite(line.get("intercept", np.nan)):
        b.extras["kobs_line"]["global_koff_per_s"] = kf
    if receptor_conc is not None:
        bound = eq.depletion_association(np.inf, distinct[distinct > 0], receptor_conc, kon, kf)
        b.extras["depletion"] = {
            "model": "exact solution of second-order binding with ligand depletion (Riccati)",
            "receptor_conc_M": float(receptor_conc),
            "max_fraction_of_ligand_bound": float(np.max(bound / distinct[distinct > 0])) if bound.size else None,
        }
    else:
        _depletion_signs(b, fit, line, max_nfev)
    if two_state and koff is None and receptor_conc is None and np.unique(distinct[distinct > 0]).size >= 4:
        _two_state(b, fit, line, max_nfev)
    return b.result([fit])


def _single_concentration(b: _Builder, t: FloatArray, y: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                          concs: FloatArray, koff: float | None, intervals: str, max_nfev: int | None,
                          strict: bool, weights: str) -> FitResult:
    _min_points(t.size, 1 + 2 * len(curves), b.method, idx if len(curves) > 1 else None)
    fit = _run_rise(t, y, max_nfev, weights, idx, curves)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    kobs = fit.value("kobs")
    kci = _ci(fit, ivs, "kobs")
    b.put("kobs", kobs, kci, ivs["kobs"].kind)
    L = float(concs[0])
    if koff is None:
        b.warn("kobs-only", "one concentration gives kobs = kon*L + koff only: give koff (from a dissociation "
               "experiment) to get kon, or measure several concentrations")
    elif not np.isfinite(L) or L <= 0:
        b.warn("kobs-only", "kon needs the ligand concentration of the curve (concentration column)")
    else:
        b.put("koff", koff)
        b.put("residence_time", 1.0 / koff)
        b.put("half_life", LN2 / koff)
        if kobs <= koff:
            b.warn("kobs-below-koff", f"kobs {rate1(kobs)} is not above the given koff {rate1(koff)}: kon cannot "
                   "be computed (check koff, the concentration and time units)")
        else:
            kon = (kobs - koff) / L
            kon_ci = (max((kci[0] - koff) / L, 0.0), (kci[1] - koff) / L)
            b.put("kon", kon, kon_ci, ivs["kobs"].kind)
            b.put("kd", koff / kon, _recip_ci(kon_ci, koff), ivs["kobs"].kind)
            _kon_check(b, kon)
            if kon_ci[0] <= 0:
                b.warn("kon-poor", "the kobs interval reaches the given koff: kon's lower limit is zero")
    b.extras["concentration_M"] = L
    return b.result([fit])


def _shape(kind: str, t: FloatArray, Lp: FloatArray, kon: float, koff: float, r0: float | None) -> FloatArray:
    if kind == "global-association-depletion" and r0 is not None:
        return eq.depletion_association(t, Lp, r0, kon, koff) / r0
    kd = koff / kon
    return np.asarray(Lp / (Lp + kd) * -np.expm1(-(kon * Lp + koff) * t), dtype=np.float64)


def _global_fit(t: FloatArray, y: FloatArray, idx: IntArray, curves: Sequence[CurveInfo], concs: FloatArray,
                koff: float | None, receptor_conc: float | None, weights: str, line: dict[str, Any] | None,
                per: list[tuple[float, float, float, str]], max_nfev: int | None) -> _Fit:
    kind = "global-association" if receptor_conc is None else "global-association-depletion"
    distinct = np.unique(concs[np.isfinite(concs)])
    slope, icpt = (line["slope"], line["intercept"]) if line else (math.nan, math.nan)
    kobs_vals = np.array([p[1] for p in per]) if per else np.array([1.0 / float(t.max())])
    conc_pos = distinct[distinct > 0]
    kon_guesses = [slope] if np.isfinite(slope) and slope > 0 else []
    if per:
        kon_guesses.append(float(np.median([p[1] / p[0] for p in per if p[0] > 0])) if conc_pos.size else 1e6)
    kon_guesses = [float(np.clip(k, KON_LIMITS[0] * 10, KON_LIMITS[1] / 10)) for k in kon_guesses] or [1e6]
    if koff is not None:
        koff_guesses = [koff]
    else:
        koff_guesses = [icpt] if np.isfinite(icpt) and icpt > 0 else []
        koff_guesses += [0.1 * float(kobs_vals.min()), 0.5 * float(kobs_vals.min())]
    koff_guesses = [float(np.clip(k, KOFF_LIMITS[0] * 10, KOFF_LIMITS[1] / 10)) for k in koff_guesses]
    Lp = concs[idx]
    ones = np.ones_like(t)

    # candidates: the kobs line's slope/intercept, plus a coarse grid (kon x koff) for data sets
    # whose single-curve fits say little; Bmax and baseline solved exactly for each
    kon_guesses += [float(v) for v in np.geomspace(1e3, 1e9, 13)]
    if koff is None:
        koff_guesses += [float(v) for v in _rate_grid(t, 10)]
    starts: list[tuple[float, float, float, FloatArray]] = []
    for kon0 in kon_guesses:
        for kf0 in koff_guesses:
            with np.errstate(all="ignore"):
                coef, ssr = _lin(np.column_stack([_shape(kind, t, Lp, kon0, kf0, receptor_conc), ones]), y)
            if np.isfinite(ssr):
                starts.append((ssr, kon0, kf0, coef))
    if not starts:
        raise FitError("association: the model cannot be evaluated on these data")
    starts.sort(key=lambda s: s[0])
    distinct_starts: list[tuple[float, float, float, FloatArray]] = []
    for st in starts:  # up to four starts, at least a decade apart
        if len(distinct_starts) == 4:
            break
        if all(abs(math.log10(st[1] / o[1])) + abs(math.log10(st[2] / o[2])) > 1.0 for o in distinct_starts):
            distinct_starts.append(st)
    _, kon0, kf0, coef = distinct_starts[0]
    ps = [
        Param("kon", kon0, True, *KON_LIMITS, key=True),
        Param("koff", kf0, True, *KOFF_LIMITS, fixed=koff is not None, key=True),
        Param("bmax", float(coef[0])),
        Param("baseline", float(coef[1])),
    ]
    ctx = {} if receptor_conc is None else {"receptor_conc": float(receptor_conc)}
    prob = _Problem(kind, ps, t, y, idx, curves, ctx, weights=weights)
    nl = ["kon"] + (["koff"] if koff is None else [])

    def g_design(p: Params) -> FloatArray:
        return np.column_stack([_shape(kind, t, Lp, p["kon"], p["koff"], receptor_conc), ones])

    return _run_vp(prob, nl, g_design, lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
                   [[math.log10(a), math.log10(c_)][: len(nl)] for _, a, c_, _co in distinct_starts], max_nfev)


def _depletion_signs(b: _Builder, fit: _Fit, line: dict[str, Any] | None, max_nfev: int | None) -> None:
    """Warn when the plateaus do not follow L/(L+KD) or kobs is convex in L (signs of ligand depletion)."""
    prob = fit.prob
    t, y, idx, curves = prob.x, prob.y, prob.idx, prob.curves
    nc = len(curves)
    signs: list[str] = []
    if nc >= 3 and fit.dof > nc:
        Lc = np.array([c.conc for c in curves])
        w = prob.w

        def design(p: Params) -> FloatArray:
            kobs = p["kon"] * Lc + p["koff"]
            cols = [_ind(idx, i) * -np.expm1(-kobs[i] * t) for i in range(nc)]
            return np.column_stack(cols + [np.ones_like(t)])

        names = [f"amplitude[{c.label}]" for c in curves] + ["baseline"]
        ps = [Param("kon", fit.value("kon"), True, *KON_LIMITS), Param("koff", fit.value("koff"), True, *KOFF_LIMITS)]
        ps += [Param(n, 1.0) for n in names]
        alt_prob = _Problem("rise-free-plateaus", ps, t, y, idx, curves, weights="none")
        alt_prob.w = w  # the global fit's weights, held fixed for a like-for-like comparison
        try:
            alt = _run_vp(alt_prob, ["kon", "koff"], design, lambda c: dict(zip(names, map(float, c))),
                          [[math.log10(fit.value("kon")), math.log10(fit.value("koff"))]], max_nfev)
        except FitError:
            alt = None
        if alt is not None and alt.dof > 0 and 0 < alt.ssr < fit.ssr:
            df1 = fit.dof - alt.dof
            F = ((fit.ssr - alt.ssr) / df1) / (alt.ssr / alt.dof)
            p_pl = float(stats.f.sf(F, df1, alt.dof))
            b.extras["plateau_test"] = {"f_test_p": p_pl, "df": [df1, alt.dof]}
            if p_pl < DEPLETION_P:
                signs.append(f"the plateaus do not follow L/(L+KD) (per-curve plateaus fit better, F test "
                             f"p = {p_pl:.2g})")
    if line is not None and line.get("convex_p") is not None and line["convex_p"] < DEPLETION_P:
        signs.append(f"kobs is not linear in the nominal concentration (convex, F test p = {line['convex_p']:.2g})")
    if signs:
        b.warn("depletion-suspected", "; ".join(signs) + ": signs of ligand depletion (receptor concentration near "
               "or above KD, so free ligand falls below the nominal concentration); kon, koff and KD may be off: "
               "give the receptor concentration (receptor_conc) for the depletion-aware model, and check the "
               "concentrations")


def _two_state(b: _Builder, one: _Fit, line: dict[str, Any] | None, max_nfev: int | None) -> None:
    """Fit the two-state (induced-fit) model and compare it with the one-step fit.

    R + L <-> RL (fast, dissociation constant K1), RL <-> RL* (k_fwd, k_rev):
    with the first step in rapid equilibrium each curve is one exponential
    with kobs = k_rev + k_fwd*L/(L + K1), rising from the pre-equilibrium
    level L/(L + K1) (reached within the dead time) to the equilibrium
    L/(L + KD), KD = K1*k_rev/(k_fwd + k_rev) (Vauquelin 2016, Br J Pharmacol
    173:1268-1285 for the concave kobs plot; the hyperbolic kobs of a rapid
    pre-equilibrium is textbook, from memory).
    """
    prob = one.prob
    t, y, idx, curves = prob.x, prob.y, prob.idx, prob.curves
    Lp = np.array([c.conc for c in curves])[idx]
    ones = np.ones_like(t)

    def shape(k_fwd: float, k_rev: float, k1: float) -> FloatArray:
        kobs = k_rev + k_fwd * Lp / (Lp + k1)
        kd = k1 * k_rev / (k_fwd + k_rev)
        f_eq = Lp / (Lp + kd)
        f_1 = Lp / (Lp + k1)
        return np.asarray(np.where(t > 0, f_eq - (f_eq - f_1) * np.exp(-kobs * t), 0.0), dtype=np.float64)

    L = np.unique(Lp[Lp > 0])
    kon, koff = one.value("kon"), one.value("koff")
    kmax = float(line["kobs_max_per_s"]) if line and "kobs_max_per_s" in line else kon * float(L.max()) + koff
    k1_grid = np.geomspace(float(L.min()) / 10.0, float(L.max()) * 10.0, 9)
    cand: list[tuple[float, float, float, float]] = []
    for k1 in k1_grid:
        for frac in (0.3, 0.7, 0.95):
            k_rev = max(koff, 1e-8)
            k_fwd = max(kmax * frac * (1 + k1 / float(L.max())) - k_rev, k_rev)
            with np.errstate(all="ignore"):
                _, ssr = _lin(np.column_stack([shape(k_fwd, k_rev, float(k1)), ones]), y, prob.w)
            if np.isfinite(ssr):
                cand.append((ssr, k_fwd, k_rev, float(k1)))
    if not cand:
        return
    cand.sort()
    _, kf0, kr0, k10 = cand[0]
    ps = [Param("k_fwd", kf0, True, *KOFF_LIMITS, key=True), Param("k_rev", kr0, True, *KOFF_LIMITS, key=True),
          Param("k1", k10, True, *IC50_LIMITS, key=True), Param("bmax", 1.0), Param("baseline", 0.0)]
    alt_prob = _Problem("induced-fit-association", ps, t, y, idx, curves, weights="none")
    alt_prob.w = prob.w
    try:
        alt = _run_vp(alt_prob, ["k_fwd", "k_rev", "k1"],
                      lambda p: np.column_stack([shape(p["k_fwd"], p["k_rev"], p["k1"]), ones]),
                      lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
                      [[math.log10(a), math.log10(r), math.log10(k)] for _, a, r, k in cand[:3]], max_nfev)
    except FitError:
        return
    n = one.n
    if alt.dof <= 0 or alt.ssr <= 0:
        return

    def aicc(ssr: float, k: int) -> float:
        return n * math.log(ssr / n) + 2 * k + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf)

    df1 = one.dof - alt.dof
    p = 1.0
    if alt.ssr < one.ssr and df1 > 0:
        F = ((one.ssr - alt.ssr) / df1) / (alt.ssr / alt.dof)
        p = float(stats.f.sf(F, df1, alt.dof))
    d_aicc = aicc(one.ssr, one.k) - aicc(alt.ssr, alt.k)
    k_fwd, k_rev, k1 = alt.value("k_fwd"), alt.value("k_rev"), alt.value("k1")
    kd = k1 * k_rev / (k_fwd + k_rev)
    preferred = p < TWO_STATE_P and d_aicc > TWO_STATE_DAICC
    b.extras["two_state"] = {
        "model": "R + L <-> RL (K1, rapid) <-> RL* (k_fwd, k_rev); kobs = k_rev + k_fwd*L/(L + K1)",
        "k1_M": k1, "k_fwd_per_s": k_fwd, "k_rev_per_s": k_rev, "kd_M": kd,
        "residence_time_s": 1.0 / k_rev, "f_test_p": p, "delta_aicc": d_aicc,
        "aicc_one_step": aicc(one.ssr, one.k), "aicc_two_state": aicc(alt.ssr, alt.k),
        "preferred": "two-state" if preferred else "one-step",
    }
    if preferred:
        b.warn("two-state-preferred", f"the two-state (induced-fit) model fits clearly better (F test p = {p:.2g}, "
               f"AICc lower by {d_aicc:.1f}): K1 {conc(k1)}, k_fwd {rate1(k_fwd)}, k_rev {rate1(k_rev)}, overall KD "
               f"{conc(kd)}, residence time ~1/k_rev = {duration(1 / k_rev)}; the one-step kon/koff are apparent values "
               "(Vauquelin 2016, Br J Pharmacol 173:1268)")


def _kobs_line(b: _Builder, per: list[tuple[float, float, float, str]]) -> dict[str, Any] | None:
    """Weighted line kobs = koff + kon*L over per-curve fits; curvature check."""
    if len(per) < 2:
        return None
    L = np.array([p[0] for p in per])
    k = np.array([p[1] for p in per])
    se = np.array([p[2] for p in per])
    if np.unique(L).size < 2:
        return None
    w = 1.0 / se**2 if np.all(np.isfinite(se) & (se > 0)) else np.ones_like(k)
    X = np.column_stack([np.ones_like(L), L])
    W = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(X * W[:, None], k * W, rcond=None)
    out: dict[str, Any] = {"concentrations_M": L, "kobs_per_s": k, "kobs_se_per_s": se, "labels": [p[3] for p in per],
           "intercept": float(coef[0]), "slope": float(coef[1])}
    n = L.size
    if n > 2:
        r = (k - X @ coef) * W
        s2 = float(r @ r) / (n - 2)
        cov = s2 * np.linalg.pinv((X * w[:, None]).T @ X)
        tq = _tq(n - 2)
        out["intercept_ci95"] = [coef[0] - tq * math.sqrt(cov[0, 0]), coef[0] + tq * math.sqrt(cov[0, 0])]
        out["slope_ci95"] = [coef[1] - tq * math.sqrt(cov[1, 1]), coef[1] + tq * math.sqrt(cov[1, 1])]
        if out["intercept_ci95"][0] <= 0:
            b.warn("koff-intercept-poor", "the kobs-vs-concentration intercept (koff) is not distinguishable from "
                   "zero: koff is better measured directly by dissociation")
    if np.unique(L).size >= 4 and n >= 4:
        # saturating alternative kobs = a + b*L/(K + L), which contains the line as K -> infinity;
        # extra-sum-of-squares F test of the weighted fits, K scanned on a log grid
        def wssr(X: FloatArray) -> tuple[float, FloatArray]:
            c = np.linalg.lstsq(X * W[:, None], k * W, rcond=None)[0]
            r = (k - X @ c) * W
            return float(r @ r), c

        ssr_line = wssr(X)[0]
        best: tuple[float, float, FloatArray | None] = (math.inf, math.nan, None)
        for K in np.geomspace(L.min() / 30.0, L.max() * 300.0, 80):
            ssr_h, cc = wssr(np.column_stack([np.ones_like(L), L / (K + L)]))
            if ssr_h < best[0]:
                best = (ssr_h, float(K), cc)
        ssr_h, Kb, c = best
        if n > 3 and ssr_h > 0 and c is not None and c[1] > 0 and Kb < 3.0 * L.max():
            F = (ssr_line - ssr_h) / (ssr_h / (n - 3))
            p = float(stats.f.sf(F, 1, n - 3))
            out.update({"curvature_p": p, "saturation_K_M": Kb, "kobs_max_per_s": float(c[0] + c[1])})
            if p < 0.01:
                b.warn("kobs-curved", f"kobs rises less than linearly with concentration (saturating, F test p = "
                       f"{p:.2g}): suggests a two-step (induced-fit) mechanism; kon and koff from a one-step model "
                       "are apparent values (Vauquelin 2016, Br J Pharmacol 173:1268)")
    if np.unique(L).size >= 4 and n >= 4:
        # convex alternative kobs = a + b*L + c*L^2 (c > 0): free ligand below nominal at low L (depletion)
        Xq = np.column_stack([np.ones_like(L), L, L * L])
        cq = np.linalg.lstsq(Xq * W[:, None], k * W, rcond=None)[0]
        rq = (k - Xq @ cq) * W
        ssr_q = float(rq @ rq)
        rl = (k - X @ coef) * W
        ssr_l = float(rl @ rl)
        if ssr_q > 0 and cq[2] > 0 and ssr_q < ssr_l:
            Fq = (ssr_l - ssr_q) / (ssr_q / (n - 3))
            out["convex_p"] = float(stats.f.sf(Fq, 1, n - 3))
    b.extras["kobs_line"] = out
    return out


