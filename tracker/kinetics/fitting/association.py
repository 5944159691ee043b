"""Association: one curve (kobs) or a global kon/koff fit, the kobs line and its curvature check."""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from ...errors import FitError
from ...fmt import rate1
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


# ============================================================== association
def _run_rise(t: FloatArray, y: FloatArray, max_nfev: int | None = None, weights: str = "none") -> _Fit:
    """One-phase rise Y = y0 + A*(1 - exp(-kobs*t)) of one curve."""
    grid = _rate_grid(t)
    curves, idx = (CurveInfo("all"),), np.zeros(t.size, dtype=np.intp)

    def design(k: float) -> FloatArray:
        return np.column_stack([-np.expm1(-k * t), np.ones_like(t)])

    scored = sorted((_lin(design(k), y)[1], k) for k in grid)
    starts = [np.r_[math.log10(k), _lin(design(k), y)[0]] for _, k in scored[:3]]
    k0 = scored[0][1]
    c0 = _lin(design(k0), y)[0]
    ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True), Param("amplitude", c0[0]), Param("y0", c0[1])]
    return _run_vp(_Problem("one-phase-association", ps, t, y, idx, curves, weights=weights), ["kobs"],
                   lambda p: design(p["kobs"]), lambda c: {"amplitude": float(c[0]), "y0": float(c[1])},
                   [[float(z[0])] for z in starts], max_nfev)


def fit_association(
    t: npt.ArrayLike, signal: npt.ArrayLike, conc: npt.ArrayLike | None = None, curve: npt.ArrayLike | None = None,
    *, koff: float | None = None, intervals: str = "auto",
    max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Association time courses.

    One concentration: Y = y0 + A*(1 - exp(-kobs*t)) gives ``kobs``; with a
    known ``koff`` (from a dissociation experiment) and the concentration L,
    ``kon`` = (kobs - koff)/L and ``kd`` = koff/kon.

    Several concentrations: a global fit of specific binding
    Y = baseline + Bmax*L/(L+KD)*(1 - exp(-(kon*L + koff)*t)) with kon, koff,
    Bmax and the baseline shared (``koff`` fixed when given).  As a cross-check
    each curve is also fitted alone and kobs is regressed on L (weighted line:
    slope kon, intercept koff; ``extras['kobs_line']``).

    Warnings
    --------
    ``kobs-curved``
        the kobs-vs-L plot bends down: a saturating kobs = a + b*L/(K + L)
        beats the line (F test p < 0.01, four or more concentrations, K below
        3x the top concentration): a two-step (induced-fit) mechanism is
        likely and the one-step kon/koff are apparent values (Vauquelin 2016,
        Br J Pharmacol 173:1268-1285).
    ``koff-intercept-poor``
        the intercept's interval includes zero; measure koff by dissociation.
    ``fast-vs-sampling``
        a curve is at equilibrium by its first reading; it is left out of the
        kobs line (the global fit still uses its plateau).
    ``kobs-only``, ``kobs-below-koff``, ``kon-above-practical``, ``at-limit``, ``ci-open``.
    """
    method = "association"
    t, y = _arrays(t, signal)
    _not_constant(y, method)
    if koff is not None and not (np.isfinite(koff) and koff > 0):
        raise FitError("a given koff must be a positive number (1/s)")
    curves, idx = _group(t.size, curve, conc)
    concs = np.array([c.conc for c in curves])
    known = np.all(np.isfinite(concs))
    distinct = np.unique(concs[np.isfinite(concs)])
    b = _Builder(method)
    if len(curves) == 1 or not known or (distinct.size < 2 and koff is None):
        if len(curves) > 1 and not known:
            raise FitError("several association curves need a concentration column (ligand concentration per curve)")
        if len(curves) > 1:
            raise FitError("several association curves at one concentration: give --koff, or measure two or more "
                           "concentrations")
        _min_points(t.size, 3, method)
        fit = _run_rise(t, y, max_nfev)
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

    # ---- several concentrations: per-curve kobs, line, then the global fit
    per = []
    for i, c in enumerate(curves):
        sel = idx == i
        if not c.conc > 0 or sel.sum() < 5 or np.ptp(y[sel]) == 0:
            continue
        try:
            f_i = _run_rise(t[sel], y[sel], max_nfev)
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
        per.append((c.conc, k_i, se, c.label))
    line = _kobs_line(b, per)

    nfree = 3 + (koff is None)
    _min_points(t.size, nfree, method, idx, per_curve=3)
    slope, icpt = (line["slope"], line["intercept"]) if line else (np.nan, np.nan)
    kobs_vals = np.array([p[1] for p in per]) if per else np.array([1.0 / t.max()])
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

    def lin_part(kon: float, kf: float) -> tuple[FloatArray, float]:
        kd = kf / kon
        shape = Lp / (Lp + kd) * -np.expm1(-(kon * Lp + kf) * t)
        return _lin(np.column_stack([shape, np.ones_like(t)]), y)

    # candidates: the kobs line's slope/intercept, plus a coarse grid (kon x koff) for data sets
    # whose single-curve fits say little; Bmax and baseline solved exactly for each
    kon_guesses += list(np.geomspace(1e3, 1e9, 13))
    if koff is None:
        koff_guesses += list(_rate_grid(t, 10))
    starts: list[tuple[float, float, float, FloatArray]] = []
    for kon0 in kon_guesses:
        for kf0 in koff_guesses:
            coef, ssr = lin_part(kon0, kf0)
            if np.isfinite(ssr):
                starts.append((ssr, kon0, kf0, coef))
    starts.sort(key=lambda s: s[0])
    distinct_starts: list[tuple[float, float, float, FloatArray]] = []
    for st in starts:  # up to four starts, at least a decade apart
        if len(distinct_starts) == 4:
            break
        if all(abs(math.log10(st[1] / o[1])) + abs(math.log10(st[2] / o[2])) > 1.0 for o in distinct_starts):
            distinct_starts.append(st)
    starts = distinct_starts
    _, kon0, kf0, coef = starts[0]
    ps = [
        Param("kon", kon0, True, *KON_LIMITS, key=True),
        Param("koff", kf0, True, *KOFF_LIMITS, fixed=koff is not None, key=True),
        Param("bmax", coef[0]),
        Param("baseline", coef[1]),
    ]
    prob = _Problem("global-association", ps, t, y, idx, curves)
    nl = ["kon"] + (["koff"] if koff is None else [])

    def g_design(p: Params) -> FloatArray:
        kd = p["koff"] / p["kon"]
        return np.column_stack([Lp / (Lp + kd) * -np.expm1(-(p["kon"] * Lp + p["koff"]) * t), np.ones_like(t)])

    fit = _run_vp(prob, nl, g_design, lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
                  [[math.log10(a), math.log10(c_)][: len(nl)] for _, a, c_, _co in starts[:4]], max_nfev)
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
    return b.result([fit])


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
    b.extras["kobs_line"] = out
    return out


