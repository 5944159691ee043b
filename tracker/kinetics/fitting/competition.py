"""Competition kinetics: competitor kon/koff by Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9)."""

from __future__ import annotations

import math
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from ...errors import FitError
from ...fmt import conc, rate1
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
from .curves import CurveInfo, competition_with_depletion
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


# ============================================================== competition kinetics
def _check_coaddition(t: FloatArray, y: FloatArray, idx: IntArray, curves: Sequence[CurveInfo]) -> None:
    """Refuse curves that fall from the first reading (pre-bound tracer) or show no time course."""
    trends = _trends(t, y, idx, len(curves))
    if not any(trends):
        raise FitError(f"competition-kinetics: no curve changes with time (Spearman test p >= {TREND_P:g}): there is "
                       "no binding time course to fit")
    starts_high = []
    for i in range(len(curves)):
        sel = idx == i
        ts, ys = t[sel], y[sel]
        span = float(np.ptp(ys))
        if span <= 0:
            continue
        early = float(np.mean(ys[np.argsort(ts, kind="stable")[:2]]))
        starts_high.append((early - float(ys.min())) / span > 0.8)
    if starts_high and all(starts_high) and 1 not in trends:
        raise FitError("competition-kinetics: every curve falls from its first reading, so the tracer was bound "
                       "before time zero; Motulsky-Mahan needs tracer and competitor added together. Likely method: "
                       "dissociation (tracer displaced or washed out)")


def _design(ctx: Mapping[str, float], t: FloatArray, idx: IntArray, concs: FloatArray) -> Callable[[Params], FloatArray]:
    """Design columns (shape, 1) of the competition model: closed form, or the ODE with depletion."""
    ones = np.ones_like(t)

    def design(p: Params) -> FloatArray:
        if "receptor_conc" in ctx:
            r0 = ctx["receptor_conc"]
            s = competition_with_depletion(t, idx, concs, ctx["tracer_conc"], r0, ctx["tracer_kon"],
                                           ctx["tracer_koff"], p["kon"], p["koff"]) / r0
        else:
            s = eq.motulsky_mahan_levels(t, idx, ctx["tracer_conc"], ctx["tracer_kon"], ctx["tracer_koff"], concs,
                                         p["kon"], p["koff"], 1.0)
        return np.column_stack([s, ones])

    return design


def _log_sd(ci: tuple[float, float] | None, centre: float, what: str) -> float:
    """Standard deviation of log10 of a constant from its 95% interval (log-normal; 0 without an interval)."""
    if ci is None:
        return 0.0
    lo, hi = float(ci[0]), float(ci[1])
    if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo <= centre <= hi):
        raise FitError(f"the {what} interval must be two positive numbers around the {what} (low <= value <= high)")
    return (math.log10(hi) - math.log10(lo)) / (2.0 * float(stats.norm.ppf(0.975)))


def _tracer_monte_carlo(b: _Builder, fit: _Fit, kon_ci: tuple[float, float] | None,
                        koff_ci: tuple[float, float] | None, n: int, seed: int, max_nfev: int | None) -> None:
    """Carry the tracer constants' uncertainty into k3, k4 and Ki (seeded Monte Carlo, quadrature per side)."""
    prob = fit.prob
    ctx = prob.context
    sd_on = _log_sd(kon_ci, ctx["tracer_kon"], "tracer kon")
    sd_off = _log_sd(koff_ci, ctx["tracer_koff"], "tracer koff")
    if n < 20:
        raise FitError("the tracer Monte Carlo needs at least 20 draws")
    rng = np.random.default_rng(seed)
    draws_on = ctx["tracer_kon"] * 10 ** (sd_on * rng.standard_normal(n))
    draws_off = ctx["tracer_koff"] * 10 ** (sd_off * rng.standard_normal(n))
    t, y, idx = prob.x, prob.y, prob.idx
    concs = np.array([c.conc for c in prob.curves])
    z0 = [math.log10(fit.value("kon")), math.log10(fit.value("koff"))]
    logs = []
    for kon_j, koff_j in zip(draws_on, draws_off):
        ctx_j = dict(ctx, tracer_kon=float(kon_j), tracer_koff=float(koff_j))
        pj = _Problem(prob.kind, prob.params, t, y, idx, prob.curves, ctx_j, weights="none")
        pj.w = prob.w

        try:
            fj = _run_vp(pj, ["kon", "koff"], _design(ctx_j, t, idx, concs),
                         lambda c: {"bmax": float(c[0]), "baseline": float(c[1])}, [z0], max_nfev,
                         diff_step=1e-5 if "receptor_conc" in ctx_j else None)
        except FitError:
            continue
        logs.append((math.log10(fj.value("kon")), math.log10(fj.value("koff"))))
    if len(logs) < max(10, n // 2):
        b.warn("tracer-mc-failed", "the tracer Monte Carlo refits failed too often: the competitor's intervals do not "
               "include the tracer constants' uncertainty")
        return
    arr = np.array(logs)
    sd_k3, sd_k4 = float(np.std(arr[:, 0], ddof=1)), float(np.std(arr[:, 1], ddof=1))
    sd_ki = float(np.std(arr[:, 1] - arr[:, 0], ddof=1))
    z = float(stats.norm.ppf(0.975))
    before = {k: tuple(b.ci95[k]) for k in ("kon", "koff", "kd") if k in b.ci95}

    def widen(name: str, sd: float) -> tuple[float, float]:
        v = b.estimates[name]
        lo, hi = b.ci95[name]
        c = math.log10(v)
        dlo = c - math.log10(lo) if lo > 0 else math.inf
        dhi = math.log10(hi) - c if np.isfinite(hi) else math.inf
        extra = z * sd
        return (10 ** (c - math.hypot(dlo, extra)) if np.isfinite(dlo) else 0.0,
                10 ** (c + math.hypot(dhi, extra)) if np.isfinite(dhi) else math.inf)

    kon_ci2, koff_ci2, kd_ci2 = widen("kon", sd_k3), widen("koff", sd_k4), widen("kd", sd_ki)
    b.put("kon", b.estimates["kon"], kon_ci2, "monte-carlo")
    _rate_summary(b, b.estimates["koff"], koff_ci2, "monte-carlo")
    b.put("kd", b.estimates["kd"], kd_ci2, "monte-carlo")
    b.extras["tracer_uncertainty"] = {
        "method": "seeded Monte Carlo: log-normal tracer kon/koff matching their 95% intervals, competitor refitted "
                  "per draw, spread of log10 k3, k4, Ki added in quadrature to the fit's own interval on each side",
        "n_draws": n, "n_refits": len(logs), "seed": seed,
        "sd_log10_tracer_kon": sd_on, "sd_log10_tracer_koff": sd_off,
        "sd_log10_kon": sd_k3, "sd_log10_koff": sd_k4, "sd_log10_kd": sd_ki,
        "ci95_without_tracer_uncertainty": {k: list(v) for k, v in before.items()},
    }


def _tracer_alone_check(b: _Builder, t: FloatArray, y: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                        tracer: tuple[float, float, float], kon_ci: tuple[float, float] | None,
                        koff_ci: tuple[float, float] | None, weights: str, max_nfev: int | None,
                        receptor_conc: float | None = None) -> None:
    """Fit the tracer-alone curve (competitor 0) and compare its kobs with k1*L + k2.

    With a receptor concentration the expected rate is read, like the data's, from a one-phase fit
    to the exact depletion curve (:func:`tracker.kinetics.equations.depletion_association`).
    """
    from .association import _run_rise

    k_on, k_off, L = tracer
    zero = [i for i, c in enumerate(curves) if c.conc == 0]
    if not zero:
        return
    sel = np.isin(idx, zero)
    if sel.sum() < 5:
        return
    try:
        f = _run_rise(t[sel], y[sel], max_nfev, weights)
    except FitError:
        return
    iv = _intervals(f, "covariance")
    lo, hi = _ci(f, iv, "kobs")
    kobs = f.value("kobs")
    ts = t[sel]

    def rate(kon: float, koff: float) -> float:
        if receptor_conc is None:
            return kon * L + koff
        # with depletion the curve is not one exponential: read the expected kobs the same way as the data's,
        # from a one-phase fit to the exact depletion curve at the same times
        pred = eq.depletion_association(ts, L, receptor_conc, kon, koff) / receptor_conc
        try:
            return _run_rise(ts, pred, max_nfev).value("kobs")
        except FitError:
            return kon * math.sqrt(max((receptor_conc + L + koff / kon) ** 2 - 4.0 * receptor_conc * L, 0.0))

    expected = rate(k_on, k_off)
    corners = [rate(a, c) for a in ((kon_ci[0], kon_ci[1]) if kon_ci else (k_on,))
               for c in ((koff_ci[0], koff_ci[1]) if koff_ci else (k_off,))]
    e_lo, e_hi = min(corners + [expected]), max(corners + [expected])
    b.extras["tracer_check"] = {"kobs_tracer_alone_per_s": kobs, "kobs_ci95_per_s": [lo, hi],
                                "expected_kobs_per_s": expected, "expected_range_per_s": [e_lo, e_hi]}
    if np.isfinite(lo) and np.isfinite(hi) and (hi < e_lo or lo > e_hi):
        b.warn("tracer-constants-disagree", f"the tracer-alone curve rises with kobs {rate1(kobs)} (95% CI "
               f"{rate1(lo)} to {rate1(hi)}), but the given tracer constants predict k1*L + k2 = {rate1(expected)}: "
               "the tracer "
               "kon/koff (or its concentration) do not describe this assay, or tracer depletion changes its rate "
               "(give the receptor concentration), so the competitor's kon and koff are biased; re-measure the "
               "tracer under these conditions")


def _tracer_constants(kon: float | None, koff: float | None, conc: float | None) -> tuple[float, float, float]:
    out = []
    for name, v in (("tracer kon", kon), ("tracer koff", koff), ("tracer concentration", conc)):
        if v is None or not (np.isfinite(v) and v > 0):
            raise FitError(f"competition kinetics needs the {name} (a positive number)")
        out.append(float(v))
    return out[0], out[1], out[2]


def fit_competition_kinetics(
    t: npt.ArrayLike, signal: npt.ArrayLike, competitor_conc: npt.ArrayLike, *, tracer_kon: float | None,
    tracer_koff: float | None, tracer_conc: float | None, curve: npt.ArrayLike | None = None, intervals: str = "auto",
    max_nfev: int | None = None, strict: bool = True, weights: str = "none",
    tracer_kon_ci: tuple[float, float] | None = None, tracer_koff_ci: tuple[float, float] | None = None,
    n_monte_carlo: int = 100, seed: int = 0, receptor_conc: float | None = None,
) -> FitResult:
    """Competitor kon (k3) and koff (k4) from tracer binding with competitor (Motulsky & Mahan 1984).

    Tracer and competitor are added together at t = 0; curves at several
    competitor concentrations (0 = tracer alone) are fitted globally with the
    tracer's k1, k2 and concentration fixed, and k3, k4, Bmax and a baseline
    shared (specific binding, no depletion; Motulsky & Mahan 1984, Mol
    Pharmacol 25:1-9).  ``kd`` is the kinetic Ki = k4/k3.

    Parameters
    ----------
    t : array_like
        Time since tracer and competitor were added, s.
    signal : array_like
        Tracer binding signal.
    competitor_conc : array_like
        Competitor concentration of each point's curve, M (0 = tracer alone).
    tracer_kon, tracer_koff, tracer_conc : float
        Tracer k1 (1/(M*s)), k2 (1/s) and concentration (M).
    tracer_kon_ci, tracer_koff_ci : (float, float), optional
        95% intervals of the tracer constants (same units).  Their uncertainty
        is carried into the competitor's intervals by a seeded Monte Carlo:
        ``n_monte_carlo`` draws (seed ``seed``) of log-normal tracer constants
        matching the intervals, the competitor refitted for each, and the
        spread of log10 k3, log10 k4 (and log10 Ki) added in quadrature to
        the fit's own interval on each side (``ci_kinds`` ``monte-carlo``).
    weights : {"none", "proportional", "poisson"}
        Noise model.
    receptor_conc : float, optional
        Total receptor, M: switches to the depletion-aware model, the same
        scheme with free tracer L0 - RL and free competitor I0 - RI,
        integrated numerically (no closed form exists; see
        :func:`tracker.kinetics.fitting.curves.competition_with_depletion`).
        Slower (an ODE per evaluation) but right when the receptor is not far
        below the tracer and competitor concentrations.

    Raises
    ------
    FitError
        When the curves fall from the first reading (a dissociation or
        displacement of pre-bound tracer, not co-addition) or show no time
        course, or the tracer constants are missing.

    Warnings
    --------
    ``tracer-constants-disagree``
        the tracer-alone curve (competitor 0) has a kobs whose 95% interval
        excludes k1*L + k2 from the given tracer constants (and their
        intervals).
    ``slow-competitor``
        k4 * (window) < 1: little competitor dissociation in the window, k4 is
        poorly determined (Georgi et al. 2019, Br J Pharmacol 176:4731).
    ``fast-competitor``
        k4 > 10x the tracer's kobs: only Ki (not k3, k4) is well determined.
    ``kon-above-practical``, ``at-limit``, ``ci-open``.
    """
    method = "competition-kinetics"
    check_weights(weights)
    t, y = _arrays(t, signal)
    tracer = _tracer_constants(tracer_kon, tracer_koff, tracer_conc)
    k_on, k_off, k_conc = tracer
    _not_constant(y, method)
    curves, idx = _group(t.size, curve, competitor_conc)
    concs = np.array([c.conc for c in curves])
    if not np.any(concs > 0):
        raise FitError("competition kinetics needs at least one curve with competitor (concentration > 0)")
    _min_points(t.size, 4, method, idx, per_curve=3)
    _check_coaddition(t, y, idx, curves)
    ctx = {"tracer_kon": k_on, "tracer_koff": k_off, "tracer_conc": k_conc}

    def shape(k3: float, k4: float) -> FloatArray:
        return eq.motulsky_mahan_levels(t, idx, k_conc, k_on, k_off, concs, k3, k4, 1.0)

    if receptor_conc is not None and not (np.isfinite(receptor_conc) and receptor_conc > 0):
        raise FitError("the receptor concentration must be a positive number (M)")

    # starting values: a 12 x 12 grid over (koff, Ki), evaluated at once on the distinct
    # (concentration, time) pairs, with Bmax and baseline solved in closed form per grid point
    k4_grid = _rate_grid(t, 12)
    ipos = concs[concs > 0]
    ki_grid = np.geomspace(ipos.min() / 300.0, ipos.max() * 10.0, 12)
    K4m, KI = np.meshgrid(k4_grid, ki_grid, indexing="ij")
    K4 = K4m.ravel()
    K3 = np.clip(K4 / KI.ravel(), KON_LIMITS[0] * 10, KON_LIMITS[1] / 10)
    tu, tinv = np.unique(t, return_inverse=True)
    W = np.zeros((concs.size, tu.size))
    Y = np.zeros_like(W)
    np.add.at(W, (idx, tinv), 1.0)
    np.add.at(Y, (idx, tinv), y)
    with np.errstate(all="ignore"):
        c0, c1, kf, c2, ks = (a[..., None] for a in eq.motulsky_mahan_coefficients(
            k_conc, k_on, k_off, concs[None, :], K3[:, None], K4[:, None]))
        S = c0 + c1 * np.exp(-kf * tu) + c2 * np.exp(-ks * tu)  # (grid, level, time)
        n = float(t.size)
        sx = np.einsum("glt,lt->g", S, W)
        sxx = np.einsum("glt,glt,lt->g", S, S, W)
        sxy = np.einsum("glt,lt->g", S, Y)
        sy = y.sum()
        det = n * sxx - sx * sx
        slope = (n * sxy - sx * sy) / det
        icpt = (sy - slope * sx) / n
        ssr = float(y @ y) - slope * sxy - icpt * sy
    ok = np.isfinite(ssr) & (det > 0)
    if not np.any(ok):
        raise FitError("competition kinetics: the model cannot be evaluated on these data")
    chosen: list[int] = []
    for i in np.argsort(np.where(ok, ssr, np.inf)):  # up to three distinct starts, best first
        if not ok[i] or len(chosen) == 3:
            break
        if all(abs(math.log10(K3[i] / K3[j])) + abs(math.log10(K4[i] / K4[j])) > 1.0 for j in chosen):
            chosen.append(int(i))
    cand = [(float(ssr[i]), float(K3[i]), float(K4[i]), (float(slope[i]), float(icpt[i]))) for i in chosen]
    _, k30, k40, cf0 = cand[0]
    ones = np.ones_like(t)
    ps = [
        Param("kon", k30, True, *KON_LIMITS, key=True),
        Param("koff", k40, True, *KOFF_LIMITS, key=True),
        Param("bmax", cf0[0]),
        Param("baseline", cf0[1]),
    ]
    prob = _Problem("motulsky-mahan", ps, t, y, idx, curves, ctx, weights=weights)
    fit = _run_vp(prob, ["kon", "koff"], lambda p: np.column_stack([shape(p["kon"], p["koff"]), ones]),
                  lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
                  [[math.log10(a), math.log10(c_)] for _, a, c_, _co in cand[:3]], max_nfev)
    if receptor_conc is not None:
        # depletion-aware model (ODE), started from the closed-form fit
        ctx_d = dict(ctx, receptor_conc=float(receptor_conc))
        prob_d = _Problem("motulsky-mahan-depletion", ps, t, y, idx, curves, ctx_d, weights=weights)
        fit = _run_vp(prob_d, ["kon", "koff"], _design(ctx_d, t, idx, concs),
                      lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
                      [[math.log10(fit.value("kon")), math.log10(fit.value("koff"))]], max_nfev, diff_step=1e-5)
    b = _Builder(method, weights)
    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    k3, k4 = fit.value("kon"), fit.value("koff")
    k4_ci = _ci(fit, ivs, "koff")
    _rate_summary(b, k4, k4_ci, ivs["koff"].kind)
    b.put("kon", k3, _ci(fit, ivs, "kon"), ivs["kon"].kind)
    b.put("kd", k4 / k3, *_kd_ci(fit, ivs))
    _kon_check(b, k3)
    if tracer_kon_ci is not None or tracer_koff_ci is not None:
        _tracer_monte_carlo(b, fit, tracer_kon_ci, tracer_koff_ci, n_monte_carlo, seed, max_nfev)
    _tracer_alone_check(b, t, y, idx, curves, tracer, tracer_kon_ci, tracer_koff_ci, weights, max_nfev, receptor_conc)
    if receptor_conc is not None:
        bound = float(eq.depletion_association(np.inf, k_conc, receptor_conc, k_on, k_off))
        b.extras["depletion"] = {
            "model": "R + L <-> RL, R + I <-> RI with free tracer and competitor depleted; integrated by scipy "
                     "solve_ivp (LSODA, analytic Jacobian, rtol 1e-9)",
            "receptor_conc_M": float(receptor_conc), "tracer_fraction_bound_alone": bound / k_conc,
        }
    tmax = float(t.max())
    ka = k_on * k_conc + k_off
    b.extras.update({"tracer_kobs_per_s": ka, "window_s": tmax, "koff_times_window": k4 * tmax})
    if k4 * tmax < 1.0:
        b.warn("slow-competitor", f"koff x window = {k4 * tmax:.2g} < 1: the competitor barely dissociates within "
               "the experiment, so koff is poorly determined; lengthen the window (Georgi et al. 2019, "
               "Br J Pharmacol 176:4731)")
    if k4 > 10.0 * ka:
        b.warn("fast-competitor", f"the competitor's koff ({rate1(k4)}) is more than 10x the tracer's kobs "
               f"({rate1(ka)}): the curves mostly show the equilibrium shift, so only Ki = koff/kon is well "
               "determined (Georgi et al. 2019)")
    return b.result([fit])


