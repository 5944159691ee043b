"""95% intervals: covariance, checked and replaced by a profile when unreliable.

Covariance intervals follow the usual recipe: s^2 = 2*cost/dof,
cov = s^2*pinv(J^T J), estimate +- t(0.975, dof)*se in the fitted (log10)
scale.  For the headline parameters the recipe is checked: if the parameter
sits at a fitting limit, the covariance is singular, or the sum of squares at
the covariance limits differs from the F threshold by more than about a third
(a strongly non-linear problem), the interval is a profile instead (the
parameter fixed on a grid, the others refitted, until the sum of squares rises
by t^2*s^2, the F(1, dof) threshold).  A profile that reaches the fitting limit
without crossing the threshold is *open* (``0``/``inf``).  Weighted fits use
the weighted sums of squares throughout.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from .engine import FloatArray, _Fit, _Problem, _solve

NONLINEAR_BAND = (0.7, 1.4)  # accepted ratio of dSSR at the covariance limits to t^2*s^2
INTERVAL_MODES = ("auto", "covariance", "profile")
_INTERVAL_MODES = INTERVAL_MODES


@dataclass(frozen=True)
class _Interval:
    lo: float  # internal coordinates; +-inf when open
    hi: float
    kind: str  # 'covariance' | 'profile' | 'none'


def _tq(dof: int, level: float = 0.95) -> float:
    return float(stats.t.ppf(0.5 + level / 2.0, max(dof, 1)))


def _refit_with_fixed(fit: _Fit, j: int, value: float, warm: FloatArray) -> tuple[float, FloatArray]:
    prob = fit.prob
    start = np.array(warm, dtype=np.float64)
    start[j] = value
    free = prob.free[prob.free != j]
    if free.size == 0:
        return prob.ssr(start), start
    th, res = _solve(prob, start, free)
    return 2.0 * float(res.cost), th


def _profile_side(fit: _Fit, j: int, direction: int, target: float, step0: float) -> float:
    prob = fit.prob
    bound = float(prob.hi[j] if direction > 0 else prob.lo[j])
    x_prev, warm = float(fit.theta[j]), fit.theta.copy()
    step = step0
    cap = fit.ssr + 10.0 * (target - fit.ssr)
    for _ in range(45):
        x = x_prev + direction * step
        at_bound = (direction > 0 and x >= bound) or (direction < 0 and x <= bound)
        if at_bound:
            x = bound
        ssr, th = _refit_with_fixed(fit, j, x, warm)
        if ssr >= target:
            state = {"warm": warm}

            def g(v: float) -> float:
                s, t_ = _refit_with_fixed(fit, j, v, state["warm"])
                if s < target:
                    state["warm"] = t_
                return min(s, cap) - target

            try:
                return float(optimize.brentq(g, x_prev, x, xtol=1e-5 * max(1.0, abs(x)), rtol=1e-6, maxiter=40))
            except (ValueError, RuntimeError):
                return float(x)
        if at_bound or not np.isfinite(x):
            return direction * math.inf
        x_prev, warm = x, th
        step *= 2.0
    return direction * math.inf


def _profile(fit: _Fit, j: int, t2: float) -> _Interval:
    prob = fit.prob
    target = fit.ssr + t2 * fit.s2
    jf = int(np.flatnonzero(prob.free == j)[0])
    se = math.sqrt(fit.cov[jf, jf]) if fit.cov is not None and fit.cov[jf, jf] > 0 else math.nan
    if prob.log[j]:
        step0 = min(max(se if np.isfinite(se) else 0.1, 0.01), 0.5)
    else:
        scale = max(abs(float(fit.theta[j])) * 0.1, 1e-3 * float(np.ptp(prob.y)) or 1e-12)
        step0 = se if np.isfinite(se) and se > 0 else scale
    lo = _profile_side(fit, j, -1, target, step0)
    hi = _profile_side(fit, j, +1, target, step0)
    return _Interval(lo, hi, "profile")


def _is_nonlinear(fit: _Fit, j: int, t2: float, half: float) -> bool:
    prob = fit.prob
    for d in (-1, 1):
        x = float(fit.theta[j]) + d * half
        if x <= prob.lo[j] or x >= prob.hi[j]:
            return True
        ssr, _ = _refit_with_fixed(fit, j, x, fit.theta)
        ratio = (ssr - fit.ssr) / (t2 * fit.s2) if fit.s2 > 0 else math.nan
        if not (NONLINEAR_BAND[0] <= ratio <= NONLINEAR_BAND[1]):
            return True
    return False


def _intervals(fit: _Fit, mode: str = "auto") -> dict[str, _Interval]:
    """95% intervals (internal coordinates) for every free parameter."""
    if mode not in INTERVAL_MODES:
        raise ValueError(f"intervals must be one of {INTERVAL_MODES}")
    prob = fit.prob
    out: dict[str, _Interval] = {}
    if fit.dof <= 0:
        return {prob.names[j]: _Interval(math.nan, math.nan, "none") for j in prob.free}
    tq = _tq(fit.dof)
    t2 = tq * tq
    for jf, j in enumerate(prob.free):
        name = prob.names[j]
        half = tq * math.sqrt(fit.cov[jf, jf]) if fit.cov is not None and fit.cov[jf, jf] >= 0 else math.nan
        th = float(fit.theta[j])
        cov_iv = _Interval(th - half, th + half, "covariance") if np.isfinite(half) else None
        if not prob.key[j]:
            out[name] = cov_iv if (cov_iv is not None and fit.cov_ok) else _Interval(math.nan, math.nan, "none")
            continue
        need = mode == "profile" or cov_iv is None or not fit.cov_ok or bool(fit.active[jf])
        if not need and mode == "auto":
            need = half == 0 or _is_nonlinear(fit, j, t2, half)
        out[name] = _profile(fit, j, t2) if need or cov_iv is None else cov_iv
    return out


def _to_nat(prob: _Problem, name: str, v: float) -> float:
    j = prob.names.index(name)
    if not prob.log[j]:
        return float(v)
    if v == -math.inf:
        return 0.0
    return float(10.0**v) if np.isfinite(v) else (math.inf if v > 0 else math.nan)


def _ci(fit: _Fit, ivs: dict[str, _Interval], name: str) -> tuple[float, float]:
    iv = ivs.get(name)
    if iv is None:
        return (math.nan, math.nan)
    return (_to_nat(fit.prob, name, iv.lo), _to_nat(fit.prob, name, iv.hi))


def _recip_ci(ci: tuple[float, float], c: float = 1.0) -> tuple[float, float]:
    lo, hi = ci

    def inv(v: float) -> float:
        if not np.isfinite(v):
            return 0.0 if v == math.inf else math.nan
        return math.inf if v == 0 else c / v

    return (inv(hi), inv(lo))


def _log_delta_ci(fit: _Fit, a: str, b: str, sign_b: int = -1) -> tuple[float, float]:
    """Delta-method interval of 10^(log10 a + sign_b*log10 b) from the covariance."""
    prob = fit.prob
    if fit.cov is None or not fit.cov_ok:
        return (math.nan, math.nan)
    fi = list(prob.free)
    ja, jb = prob.names.index(a), prob.names.index(b)
    if ja not in fi or jb not in fi:
        return (math.nan, math.nan)
    ia, ib = fi.index(ja), fi.index(jb)
    var = float(fit.cov[ia, ia] + fit.cov[ib, ib] + 2 * sign_b * fit.cov[ia, ib])
    centre = float(fit.theta[ja] + sign_b * fit.theta[jb])
    half = _tq(fit.dof) * math.sqrt(max(var, 0.0))
    return (10 ** (centre - half), 10 ** (centre + half))


def _kd_ci(fit: _Fit, ivs: dict[str, _Interval]) -> tuple[tuple[float, float], str]:
    """Interval of KD = koff/kon: delta method on the log10 pair, or (when either interval is a
    profile or the covariance is unusable) the conservative ratio of the two intervals."""
    kinds = (ivs["kon"].kind, ivs["koff"].kind)
    ci = _log_delta_ci(fit, "koff", "kon", -1)
    if np.all(np.isfinite(ci)) and "profile" not in kinds:
        return ci, "covariance"
    (klo, khi), (flo, fhi) = _ci(fit, ivs, "kon"), _ci(fit, ivs, "koff")
    lo = flo / khi if khi > 0 and np.isfinite(khi) else 0.0
    hi = fhi / klo if klo > 0 else math.inf
    return (lo, hi), ("profile" if "profile" in kinds else "covariance")
