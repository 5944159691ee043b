"""Recovery experiments: jump dilution (enzyme activity) and washout recovery (response)."""

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


# ============================================================== jump dilution
def fit_jump_dilution(
    t: npt.ArrayLike, product: npt.ArrayLike, curve: npt.ArrayLike | None = None, *, control_label: str = "control", post_dilution_conc: float | None = None,
    kapp: float | None = None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
    weights: str = "none",
) -> FitResult:
    """Recovery of enzyme activity after a jump dilution.

    Inhibited curves follow P = p0 + vs*t + (vi - vs)*(1 - exp(-kobs*t))/kobs
    (Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery, Wiley; from
    memory) with kobs and vs shared and p0, vi per curve.  Curves labelled
    ``control_label`` (uninhibited enzyme, P = p0 + vs*t) fix vs.  Inhibitor
    left after the dilution lowers the final rate to vs/(1 + I_post/Kapp); that
    factor is applied when both are given, and when the data show a final rate
    clearly different from the control's (F test p < 0.01, recovery at least
    78% complete) the final rate is fitted from the inhibited curves instead
    (warning ``vs-differs-from-control``).

    ``koff`` is kobs unless ``post_dilution_conc`` and ``kapp`` are given: for a
    one-step competitive inhibitor kobs = koff*(1 + I_post/Kapp), so the
    standard 100-fold dilution from 10x IC50 (I_post = 0.1 IC50) overstates
    koff by about 10% (Copeland, from memory); with both given,
    koff = kobs/(1 + I_post/Kapp).

    Times are s, concentrations M; ``weights`` is ``none``, ``proportional``
    or ``poisson`` (see :mod:`tracker.kinetics.fitting.engine`).  Replicate
    curves (own labels) are fitted jointly.

    Raises :class:`FitError` when product falls with time (remaining substrate
    or a binding trace, not a product curve) or when the inhibited curves slow
    down instead of speeding up (onset of inhibition, not recovery).

    Warnings: ``kobs-not-koff`` (or ``koff-corrected``), ``no-control``, ``vs-differs-from-control``,
    ``rt-lower-bound``, ``weak-initial-inhibition``, ``at-limit``, ``ci-open``.
    """
    method = "jump-dilution"
    check_weights(weights)
    t, y = _arrays(t, product)
    _not_constant(y, method)
    if (post_dilution_conc is None) != (kapp is None):
        raise FitError("the koff correction needs both the post-dilution inhibitor concentration and Kapp")
    i_post = float(post_dilution_conc) if post_dilution_conc is not None else 0.0
    if kapp is not None and not (kapp > 0 and i_post >= 0):
        raise FitError("Kapp must be positive and the post-dilution concentration not negative")
    curves, idx = _group(t.size, curve, None, control_label)
    samples = [i for i, c in enumerate(curves) if c.role != "control"]
    controls = [i for i, c in enumerate(curves) if c.role == "control"]
    if not samples:
        raise FitError(f"jump dilution needs at least one inhibited curve (a curve not labelled {control_label!r})")
    _min_points(t.size, 2 + len(curves) + len(samples), method, idx, per_curve=3)
    falling = [c.label for c, d in zip(curves, _trends(t, y, idx, len(curves))) if d < 0]
    if falling:
        raise FitError(f"jump-dilution: curve {falling[0]!r} falls with time (Spearman test p < {TREND_P:g}); product "
                       "accumulates after a jump dilution, so this looks like remaining substrate or a binding "
                       "trace; likely method: dissociation")
    slowing = []
    for i in samples:  # model-free: the rate over the last third against the first third of each curve
        sel = idx == i
        ts, ys = t[sel], y[sel]
        order = np.argsort(ts, kind="stable")
        ts, ys = ts[order], ys[order]
        third = max(3, ts.size // 3)
        if ts.size < 2 * third or np.ptp(ts[:third]) == 0 or np.ptp(ts[-third:]) == 0:
            continue
        early = float(np.polyfit(ts[:third], ys[:third], 1)[0])
        late = float(np.polyfit(ts[-third:], ys[-third:], 1)[0])
        slowing.append(early > 0 and late < 0.8 * early)
    if slowing and all(slowing):
        raise FitError("jump-dilution: the inhibited curves slow down (the late rate is below the early rate), so "
                       "activity is being lost, not recovered: this looks like onset of inhibition (a slow-binding "
                       "progress curve with inhibitor added at time zero), not recovery after dilution")
    is_ctrl = np.isin(idx, controls)
    scale = 1.0 / (1.0 + i_post / kapp) if kapp is not None else 1.0
    ctx = {"vs_scale": scale}

    def design(k: float, separate: bool) -> FloatArray:
        g = -np.expm1(-k * t) / k
        if separate:  # the inhibited curves' final rate free
            cols = [np.where(is_ctrl, t, 0.0), np.where(is_ctrl, 0.0, t - g)]
        else:  # the control fixes it: vs_inhibited = vs*scale
            cols = [np.where(is_ctrl, t, scale * (t - g))]
        cols += [_ind(idx, i) for i in range(len(curves))]  # p0
        cols += [_ind(idx, i) * g for i in samples]  # vi
        return np.column_stack(cols)

    def fit_mode(separate: bool, w_fixed: FloatArray | None = None) -> _Fit:
        grid = _rate_grid(t)
        scored = sorted((_lin(design(k, separate), y)[1], k) for k in grid)
        starts = [np.r_[math.log10(k), _lin(design(k, separate), y)[0]] for _, k in scored[:3]]
        k0 = scored[0][1]
        c0 = _lin(design(k0, separate), y)[0]
        ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True), Param("vs", c0[0])]
        if separate:
            ps.append(Param("vs_inhibited", c0[1]))
        off = 1 + int(separate)
        ps += [Param(f"p0[{c.label}]", c0[off + i]) for i, c in enumerate(curves)]
        ps += [Param(f"vi[{curves[i].label}]", c0[off + len(curves) + n]) for n, i in enumerate(samples)]
        names = [q.name for q in ps[1:]]
        prob = _Problem("jump-dilution", ps, t, y, idx, curves, ctx, weights=weights if w_fixed is None else "none")
        if w_fixed is not None:
            prob.w = w_fixed
        return _run_vp(prob, ["kobs"],
                       lambda p: design(p["kobs"], separate), lambda c: dict(zip(names, map(float, c))),
                       [[float(z[0])] for z in starts], max_nfev)

    fit = fit_mode(separate=False)
    b = _Builder(method, weights)
    if controls and fit.value("kobs") * float(t.max()) >= 1.5:
        # is the final rate of the inhibited curves really the control's?  (extra-sum-of-squares F test)
        try:
            alt = fit_mode(separate=True, w_fixed=fit.prob.w)
        except FitError:
            alt = None
        if alt is not None and alt.dof > 0 and alt.ssr < fit.ssr:
            F = (fit.ssr - alt.ssr) / (alt.ssr / alt.dof)
            p_vs = float(stats.f.sf(F, 1, alt.dof))
            ratio = alt.value("vs_inhibited") / (alt.value("vs") * scale)
            b.extras["vs_test"] = {"f_test_p": p_vs, "vs_inhibited_over_expected": ratio}
            if p_vs < 0.01:
                fit = alt
                b.warn("vs-differs-from-control", f"the recovered steady-state rate is {100 * ratio:.0f}% of the "
                       f"{'corrected ' if kapp is not None else ''}control rate (F test p = {p_vs:.2g}): inhibitor "
                       "left after dilution or incomplete recovery; the final rate was fitted from the inhibited "
                       "curves instead of being fixed by the control")

    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    kobs = fit.value("kobs")
    kci = _ci(fit, ivs, "kobs")
    kind = ivs["kobs"].kind
    b.put("kobs", kobs, kci, kind)
    if kapp is not None:
        factor = 1.0 + i_post / kapp
        koff, koff_ci = kobs / factor, (kci[0] / factor, kci[1] / factor)
        b.warn("koff-corrected", f"koff = kobs/(1 + I_post/Kapp) = kobs/{factor:.3g} for a one-step competitive "
               "inhibitor (Copeland, from memory)")
        b.extras["correction_factor"] = factor
    else:
        koff, koff_ci = kobs, kci
        b.warn("kobs-not-koff", "koff is reported as kobs: this holds only when the inhibitor left after dilution is "
               "far below Ki; for a one-step competitive inhibitor kobs = koff*(1 + I_post/Kapp), so the usual "
               "100-fold dilution from 10x IC50 overstates koff by ~10% (Copeland, from memory); give the "
               "post-dilution concentration and Kapp to correct")
    _rate_summary(b, koff, koff_ci, kind)
    vs = fit.value("vs_inhibited") if "vs_inhibited" in fit.prob.names else fit.value("vs") * scale
    if not controls:
        b.warn("no-control", "no uninhibited control curve: the steady-state rate vs is fitted from the recovery "
               f"curve itself and koff is less precise; add a curve labelled {control_label!r}")
    tmax = float(t.max())
    if kobs * tmax < -math.log(1 - RT_LOWER_BOUND_FRACTION):
        _rt_lower_bound(b, koff_ci, f"less than {100 * RT_LOWER_BOUND_FRACTION:.0f}% of the activity recovered "
                        f"within the {tmax:.4g} s window")
    for i in samples:
        lab = curves[i].label
        frac = fit.value(f"vi[{lab}]") / vs if vs != 0 else np.nan
        b.extras.setdefault("initial_activity_fraction", {})[lab] = frac
        if frac > 0.5:
            b.warn("weak-initial-inhibition", f"curve {lab!r} starts at {100 * frac:.0f}% of the uninhibited rate: "
                   "the pre-incubation did not saturate the enzyme, or dissociation is fast relative to the "
                   "first reading")
    return b.result([fit])


# ============================================================== washout recovery
def fit_washout_recovery(
    t: npt.ArrayLike, response: npt.ArrayLike, curve: npt.ArrayLike | None = None, *, control_label: str = "control", intervals: str = "auto",
    max_nfev: int | None = None, strict: bool = True, weights: str = "none",
) -> FitResult:
    """Response recovering after washout: R = Rmax*(1 - f*exp(-koff*t)).

    Time zero is the washout.  Curves share koff and Rmax and keep their own
    blocked fraction f; curves labelled ``control_label`` (no compound) are
    flat at Rmax and fix it.  Assumes free compound is gone after the wash and
    a linear occupancy-response relation; rebinding in tissue slows the
    apparent recovery (Vauquelin & Charlton 2010, Br J Pharmacol 161:488).

    Times are s; ``weights`` is ``none``, ``proportional`` or ``poisson``.
    Raises :class:`FitError` when a treated curve falls after the washout
    (run-down or onset of block, not recovery).

    Warnings: ``rt-lower-bound``, ``no-control``, ``at-limit``, ``ci-open``.
    """
    method = "washout-recovery"
    check_weights(weights)
    t, y = _arrays(t, response)
    _not_constant(y, method)
    curves, idx = _group(t.size, curve, None, control_label)
    samples = [i for i, c in enumerate(curves) if c.role != "control"]
    controls = [i for i, c in enumerate(curves) if c.role == "control"]
    if not samples:
        raise FitError(f"washout recovery needs at least one treated curve (not labelled {control_label!r})")
    _min_points(t.size, 2 + len(samples), method, idx, per_curve=3)
    falling = [curves[i].label for i, d in enumerate(_trends(t, y, idx, len(curves))) if d < 0 and i in samples]
    if falling:
        raise FitError(f"washout-recovery: curve {falling[0]!r} falls after the washout (Spearman test p < "
                       f"{TREND_P:g}): the response is running down or being blocked, not recovering; for a falling "
                       "binding signal the likely method is dissociation")

    def design(k: float) -> FloatArray:
        e = np.exp(-k * t)
        return np.column_stack([np.ones_like(t)] + [-_ind(idx, i) * e for i in samples])

    grid = _rate_grid(t)
    scored = sorted((_lin(design(k), y)[1], k) for k in grid)

    def start(k: float) -> FloatArray:
        c = _lin(design(k), y)[0]
        rmax = float(c[0]) if c[0] != 0 else 1.0
        return np.asarray(np.r_[math.log10(k), rmax, c[1:] / rmax], dtype=np.float64)

    starts = [start(k) for _, k in scored[:3]]
    s0 = starts[0]
    ps = [Param("koff", 10 ** float(s0[0]), True, *KOFF_LIMITS, key=True), Param("rmax", float(s0[1]))]
    ps += [Param(f"fraction[{curves[i].label}]", float(s0[2 + n]), key=True) for n, i in enumerate(samples)]
    prob = _Problem("washout-recovery", ps, t, y, idx, curves, weights=weights)
    fnames = [q.name for q in ps[2:]]

    def w_assemble(c: FloatArray) -> Params:
        rmax = float(c[0]) if c[0] != 0 else 1e-300
        return {"rmax": rmax, **{n: float(v) / rmax for n, v in zip(fnames, c[1:])}}

    fit = _run_vp(prob, ["koff"], lambda p: design(p["koff"]), w_assemble, [[float(z[0])] for z in starts], max_nfev)
    b = _Builder(method, weights)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    koff = fit.value("koff")
    kci = _ci(fit, ivs, "koff")
    _rate_summary(b, koff, kci, ivs["koff"].kind)
    tmax = float(t.max())
    if koff * tmax < -math.log(1 - RT_LOWER_BOUND_FRACTION):
        _rt_lower_bound(b, kci, f"less than {100 * RT_LOWER_BOUND_FRACTION:.0f}% of the blocked response recovered "
                        f"within the {tmax:.4g} s window")
    if not controls:
        b.warn("no-control", "no untreated control curve: Rmax is fitted from the recovery itself; add a curve "
               f"labelled {control_label!r}")
    return b.result([fit])


