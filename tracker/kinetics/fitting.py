"""Fits of raw kinetic time courses and dose-response sets.

Three layers, in the manner of small curve-fitting libraries:

1. closed forms and curve functions (:mod:`tracker.kinetics.fitmodels`,
   :mod:`tracker.kinetics.equations`), plain numpy functions of ``x`` and
   named parameters;
2. one ``fit_<method>`` function per experiment type that picks starting values
   from the data itself (a grid over the rate constant with the linear
   parameters solved exactly at each grid point, so hidden data sets need no
   hand-tuned guesses) and states its model, parameters and warnings;
3. one least-squares engine (:func:`scipy.optimize.least_squares`, rate
   constants fitted as log10 values, several curves fitted globally on
   concatenated residuals with shared parameters).

Every fit returns a frozen :class:`FitResult` with SI estimates, 95% intervals
and which kind they are, quality figures, warning codes, and a
:class:`CurveModel` that redraws each fitted curve with a confidence band.

Intervals
---------
Covariance intervals follow the usual recipe: s^2 = 2*cost/dof,
cov = s^2*pinv(J^T J), estimate +- t(0.975, dof)*se in the fitted (log10) scale.
For the headline parameters (rate constants, fractions) the engine checks that
recipe: if the parameter sits at a fitting limit, the covariance is singular,
or the sum of squares at the covariance limits differs from the F threshold by
more than about a third (a strongly non-linear problem), the interval is a
profile instead (the parameter fixed on a grid, the others refitted, until the
sum of squares rises by t^2*s^2, the F(1, dof) threshold).  ``ci_kind`` reports
``'profile'`` when any headline interval is a profile.  A profile that reaches
the fitting limit without crossing the threshold is *open* (``0``/``inf``, JSON
``null``) and raises the ``ci-open`` warning.

Methods
-------
``dissociation``, ``association``, ``competition-kinetics`` (Motulsky & Mahan
1984), ``jump-dilution``, ``washout-recovery``, ``ki-shift``,
``insurmountability``; see each ``fit_*`` function for the model, the curve
layout and the warnings.  :func:`fit_table` dispatches a table read by
:func:`tracker.commands.fit.read_time_course`.

Fitted values support ranking and triage of compounds.  They are not dosing
advice: an underestimated affinity can mean unexpected target coverage and
mechanism-based toxicity, so decisions rest with qualified pharmacologists,
local SOPs and regulators.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Mapping, Sequence

import numpy as np
from scipy import optimize, stats

from ..domain import FIT_METHODS as METHODS
from ..errors import FitError
from ..units import fmt_conc
from . import fitmodels as fm
from .equations import LN2, cheng_prusoff_ki
from .fitmodels import CURVE_FUNCTIONS, CurveInfo

__all__ = [
    "METHODS",
    "SCHEMA_VERSION",
    "CurveModel",
    "FitResult",
    "Param",
    "fit_association",
    "fit_competition_kinetics",
    "fit_dissociation",
    "fit_insurmountability",
    "fit_jump_dilution",
    "fit_ki_shift",
    "fit_table",
    "fit_washout_recovery",
]

SCHEMA_VERSION = 1

# fitting limits, SI (wide: they only keep the optimiser in a physical range)
KOFF_LIMITS = (1e-9, 1e3)  # 1/s
KON_LIMITS = (1e1, 1e10)  # 1/(M*s); 1e10 ~ Smoluchowski diffusion limit (from memory)
IC50_LIMITS = (1e-15, 1.0)  # M
HILL_LIMITS = (0.1, 10.0)

# decision thresholds, keyword defaults of the functions below
RT_LOWER_BOUND_FRACTION = 0.2  # < 20% of the signal dissociated: RT is a lower bound (brief)
BIPHASIC_P = 1e-3  # extra-sum-of-squares F test
BIPHASIC_DAICC = 6.0  # and AICc clearly lower (Burnham & Anderson: >~6 strong support; from memory)
NONLINEAR_BAND = (0.7, 1.4)  # accepted ratio of dSSR at the covariance limits to t^2*s^2

_INTERVAL_MODES = ("auto", "covariance", "profile")


# ============================================================== parameters
@dataclass(frozen=True)
class Param:
    """One model parameter: start value and limits in natural (SI) units.

    ``log`` parameters are fitted as log10 values (rate constants, IC50s).
    ``key`` parameters are the headline results: their interval is checked
    and switched to a profile when the covariance is unreliable.
    """

    name: str
    value: float
    log: bool = False
    lower: float = -np.inf
    upper: float = np.inf
    fixed: bool = False
    key: bool = False


class _Problem:
    """Data, parameters and curve function of one least-squares problem."""

    def __init__(self, kind: str, params: Sequence[Param], x, y, idx, curves, context=None):
        self.kind = kind
        self.func = CURVE_FUNCTIONS[kind]
        self.params = list(params)
        self.names = [p.name for p in self.params]
        self.log = np.array([p.log for p in self.params], dtype=bool)
        self.free = np.array([i for i, p in enumerate(self.params) if not p.fixed], dtype=int)
        self.key = np.array([p.key for p in self.params], dtype=bool)
        lo, hi, th = [], [], []
        for p in self.params:
            if p.log:
                if not (p.lower > 0 and p.value > 0):
                    raise FitError(f"internal: log parameter {p.name} needs positive values")
                lo.append(math.log10(p.lower))
                hi.append(math.log10(p.upper) if np.isfinite(p.upper) else np.inf)
                th.append(math.log10(p.value))
            else:
                lo.append(p.lower)
                hi.append(p.upper)
                th.append(float(p.value))
        self.lo, self.hi = np.array(lo, float), np.array(hi, float)
        th = np.array(th, float)
        span = np.where(np.isfinite(self.hi - self.lo), self.hi - self.lo, 1.0)
        self.theta0 = np.clip(th, self.lo + 1e-9 * span, self.hi - 1e-9 * span)
        self.x = np.asarray(x, float)
        self.y = np.asarray(y, float)
        self.idx = np.asarray(idx, int)
        self.curves = tuple(curves)
        self.context = dict(context or {})

    def natural(self, theta) -> dict[str, float]:
        v = np.where(self.log, 10.0 ** np.where(self.log, theta, 0.0), theta)
        return dict(zip(self.names, map(float, v)))

    def predict(self, theta, x=None, idx=None) -> np.ndarray:
        x = self.x if x is None else x
        idx = self.idx if idx is None else idx
        return self.func(self.natural(theta), x, idx, self.curves, self.context)

    def ssr(self, theta) -> float:
        r = self.predict(theta) - self.y
        return float(r @ r) if np.all(np.isfinite(r)) else np.inf


@dataclass
class _Fit:
    prob: _Problem
    theta: np.ndarray
    ssr: float
    jac: np.ndarray
    success: bool
    message: str
    active: np.ndarray
    cov: np.ndarray | None = None
    cov_ok: bool = False

    @property
    def n(self) -> int:
        return int(self.prob.y.size)

    @property
    def k(self) -> int:
        return int(self.prob.free.size)

    @property
    def dof(self) -> int:
        return self.n - self.k

    @property
    def s2(self) -> float:
        return self.ssr / self.dof if self.dof > 0 else np.nan

    def value(self, name: str) -> float:
        return self.prob.natural(self.theta)[name]


def _solve(prob: _Problem, start: np.ndarray, free: np.ndarray, max_nfev: int | None = None, tol: float = 1e-10,
           diff_step: float | None = None):
    """least_squares over the parameters ``free`` (internal coordinates); returns (theta, res)."""
    base = np.array(start, float)
    y = prob.y
    big = 1e150

    def fun(z):
        th = base.copy()
        th[free] = z
        r = prob.predict(th) - y
        if not np.all(np.isfinite(r)):
            r = np.nan_to_num(r, nan=big, posinf=big, neginf=-big)
        return r

    lo, hi = prob.lo[free], prob.hi[free]
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    z0 = np.clip(base[free], lo + 1e-10 * span, hi - 1e-10 * span)
    res = optimize.least_squares(
        fun, z0, bounds=(lo, hi), method="trf", x_scale="jac",
        ftol=tol, xtol=tol, gtol=tol,
        max_nfev=max_nfev or 100 * (free.size + 1), diff_step=diff_step,
    )
    th = base.copy()
    th[free] = res.x
    return th, res


def _run(prob: _Problem, starts: Iterable[np.ndarray] | None = None, max_nfev: int | None = None,
         tol: float = 1e-10, diff_step: float | None = None) -> _Fit:
    """Fit from each start (internal coordinates), keep the lowest sum of squares."""
    best = None
    for st in starts if starts is not None else [prob.theta0]:
        st = np.clip(np.asarray(st, float), prob.lo, prob.hi)
        try:
            th, res = _solve(prob, st, prob.free, max_nfev, tol, diff_step)
        except ValueError:
            continue
        ssr = 2.0 * float(res.cost)
        if not np.isfinite(ssr) or ssr >= 1e299:
            continue
        if best is None or ssr < best[2]:
            best = (th, res, ssr)
    if best is None:
        raise FitError(f"the {prob.kind} fit did not converge (the model cannot be evaluated on these data)")
    th, res, ssr = best
    fit = _Fit(
        prob, th, ssr, np.asarray(res.jac, float), bool(res.status > 0), str(res.message),
        np.asarray(res.active_mask != 0, bool),
    )
    fit.active |= _near_bound(prob, th)[prob.free]
    _covariance(fit)
    return fit


def _run_vp(prob: _Problem, nonlinear: Sequence[str], design: Callable[[dict], np.ndarray],
            assemble: Callable[[np.ndarray], dict], starts: Iterable[Sequence[float]],
            max_nfev: int | None = None, diff_step: float | None = None) -> _Fit:
    """Variable projection: iterate only the ``nonlinear`` parameters, solving the
    linear ones exactly at every step (Golub & Pereyra 1973, SIAM J Numer Anal
    10:413; from memory).  Robust when the linear parameters run away, e.g. a
    decay that looks like a straight line.  ``design(p)`` gives the columns
    whose coefficients ``assemble`` turns into the linear parameters' values.
    The Jacobian at the optimum (all parameters) then gives the covariance.
    ``diff_step`` (relative finite-difference step) matters for models evaluated
    numerically, e.g. by an ODE solver, whose output is not smooth at the
    default step.
    """
    y = prob.y
    jn = [prob.names.index(n) for n in nonlinear]
    base = prob.natural(prob.theta0)
    lo, hi = prob.lo[jn], prob.hi[jn]
    big = 1e150

    def nat(z):
        p = dict(base)
        for n, j, v in zip(nonlinear, jn, z):
            p[n] = 10.0**v if prob.log[j] else float(v)
        return p

    def resid(z):
        A = design(nat(z))
        if not np.all(np.isfinite(A)):
            return np.full(y.shape, big)
        r = A @ _solve_linear(A, y) - y
        return r if np.all(np.isfinite(r)) else np.full(y.shape, big)

    best = None
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    for z0 in starts:
        z0 = np.clip(np.asarray(z0, float), lo + 1e-9 * span, hi - 1e-9 * span)
        try:
            res = optimize.least_squares(resid, z0, bounds=(lo, hi), method="trf", ftol=1e-12, xtol=1e-12,
                                         gtol=1e-12, max_nfev=max_nfev or 100 * (len(jn) + 1), diff_step=diff_step)
        except ValueError:
            continue
        if best is None or res.cost < best.cost:
            best = res
    if best is None or 2 * best.cost >= 1e299:
        raise FitError(f"the {prob.kind} fit did not converge (the model cannot be evaluated on these data)")
    p = nat(best.x)
    p.update(assemble(_solve_linear(design(p), y)))
    theta = np.array([math.log10(max(p[n], 1e-300)) if lg else p[n] for n, lg in zip(prob.names, prob.log)], float)
    return _fit_at(prob, theta, bool(best.status > 0), str(best.message), diff_step)


def _fit_at(prob: _Problem, theta: np.ndarray, success: bool, message: str, diff_step: float | None = None) -> _Fit:
    """A _Fit at a known optimum: forward-difference Jacobian (stepping inwards at a bound), covariance."""
    theta = np.clip(np.asarray(theta, float), prob.lo, prob.hi)
    r0 = prob.predict(theta) - prob.y
    if not np.all(np.isfinite(r0)):
        raise FitError(f"the {prob.kind} fit did not converge (the model cannot be evaluated at the optimum)")
    rel = diff_step if diff_step is not None else np.sqrt(np.finfo(float).eps)
    J = np.empty((r0.size, prob.free.size))
    for k, j in enumerate(prob.free):
        h = rel * max(1.0, abs(theta[j]))
        if theta[j] + h > prob.hi[j]:
            h = -h
        th = theta.copy()
        th[j] += h
        J[:, k] = (prob.predict(th) - prob.y - r0) / (th[j] - theta[j])
    fit = _Fit(prob, theta, float(r0 @ r0), J, success, message, _near_bound(prob, theta)[prob.free])
    _covariance(fit)
    return fit


def _near_bound(prob: _Problem, theta: np.ndarray) -> np.ndarray:
    span = np.where(np.isfinite(prob.hi - prob.lo), prob.hi - prob.lo, np.inf)
    tol = np.where(np.isfinite(span), 1e-6 * span, 0.0)
    return (np.abs(theta - prob.lo) <= tol) | (np.abs(prob.hi - theta) <= tol)


def _covariance(fit: _Fit) -> None:
    if fit.dof <= 0 or fit.k == 0:
        return
    J = fit.jac
    if not np.all(np.isfinite(J)):
        return
    # columns scaled to unit norm first, so parameters in very different units
    # (log10 rates, signal counts) do not look singular
    d = np.linalg.norm(J, axis=0)
    d = np.where(d > 0, d, 1.0)
    try:
        _, s, vt = np.linalg.svd(J / d, full_matrices=False)
    except np.linalg.LinAlgError:
        return
    if s.size == 0 or not np.all(np.isfinite(s)) or s[0] == 0:
        return
    keep = s > s[0] * 1e-12
    inv = (vt[keep].T / s[keep] ** 2) @ vt[keep]  # pinv(Js^T Js)
    fit.cov = fit.s2 * inv / np.outer(d, d)  # = s^2 * pinv(J^T J)
    fit.cov_ok = bool(np.all(keep)) and s[-1] > s[0] * 1e-10 and np.all(np.isfinite(fit.cov))


# ============================================================== intervals
@dataclass(frozen=True)
class _Interval:
    lo: float  # internal coordinates; +-inf when open
    hi: float
    kind: str  # 'covariance' | 'profile' | 'none'


def _tq(dof: int, level: float = 0.95) -> float:
    return float(stats.t.ppf(0.5 + level / 2.0, max(dof, 1)))


def _refit_with_fixed(fit: _Fit, j: int, value: float, warm: np.ndarray) -> tuple[float, np.ndarray]:
    prob = fit.prob
    start = np.array(warm, float)
    start[j] = value
    free = prob.free[prob.free != j]
    if free.size == 0:
        return prob.ssr(start), start
    th, res = _solve(prob, start, free)
    return 2.0 * float(res.cost), th


def _profile_side(fit: _Fit, j: int, direction: int, target: float, step0: float) -> float:
    prob = fit.prob
    bound = prob.hi[j] if direction > 0 else prob.lo[j]
    x_prev, warm = fit.theta[j], fit.theta.copy()
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

            def g(v):
                s, t_ = _refit_with_fixed(fit, j, v, state["warm"])
                if s < target:
                    state["warm"] = t_
                return min(s, cap) - target

            try:
                return float(optimize.brentq(g, x_prev, x, xtol=1e-5 * max(1.0, abs(x)), rtol=1e-6, maxiter=40))
            except (ValueError, RuntimeError):
                return float(x)
        if at_bound or not np.isfinite(x):
            return direction * np.inf
        x_prev, warm = x, th
        step *= 2.0
    return direction * np.inf


def _profile(fit: _Fit, j: int, t2: float) -> _Interval:
    prob = fit.prob
    target = fit.ssr + t2 * fit.s2
    jf = int(np.flatnonzero(prob.free == j)[0])
    se = math.sqrt(fit.cov[jf, jf]) if fit.cov is not None and fit.cov[jf, jf] > 0 else np.nan
    if prob.log[j]:
        step0 = min(max(se if np.isfinite(se) else 0.1, 0.01), 0.5)
    else:
        scale = max(abs(fit.theta[j]) * 0.1, 1e-3 * float(np.ptp(prob.y)) or 1e-12)
        step0 = se if np.isfinite(se) and se > 0 else scale
    lo = _profile_side(fit, j, -1, target, step0)
    hi = _profile_side(fit, j, +1, target, step0)
    return _Interval(lo, hi, "profile")


def _is_nonlinear(fit: _Fit, j: int, t2: float, half: float) -> bool:
    prob = fit.prob
    for d in (-1, 1):
        x = fit.theta[j] + d * half
        if x <= prob.lo[j] or x >= prob.hi[j]:
            return True
        ssr, _ = _refit_with_fixed(fit, j, x, fit.theta)
        ratio = (ssr - fit.ssr) / (t2 * fit.s2) if fit.s2 > 0 else np.nan
        if not (NONLINEAR_BAND[0] <= ratio <= NONLINEAR_BAND[1]):
            return True
    return False


def _intervals(fit: _Fit, mode: str = "auto") -> dict[str, _Interval]:
    """95% intervals (internal coordinates) for every free parameter."""
    if mode not in _INTERVAL_MODES:
        raise ValueError(f"intervals must be one of {_INTERVAL_MODES}")
    prob = fit.prob
    out: dict[str, _Interval] = {}
    if fit.dof <= 0:
        return {prob.names[j]: _Interval(np.nan, np.nan, "none") for j in prob.free}
    tq = _tq(fit.dof)
    t2 = tq * tq
    for jf, j in enumerate(prob.free):
        name = prob.names[j]
        half = tq * math.sqrt(fit.cov[jf, jf]) if fit.cov is not None and fit.cov[jf, jf] >= 0 else np.nan
        cov_iv = _Interval(fit.theta[j] - half, fit.theta[j] + half, "covariance") if np.isfinite(half) else None
        if not prob.key[j]:
            out[name] = cov_iv if (cov_iv is not None and fit.cov_ok) else _Interval(np.nan, np.nan, "none")
            continue
        need = mode == "profile" or cov_iv is None or not fit.cov_ok or bool(fit.active[jf])
        if not need and mode == "auto":
            need = half == 0 or _is_nonlinear(fit, j, t2, half)
        out[name] = _profile(fit, j, t2) if need else cov_iv
    return out


def _to_nat(prob: _Problem, name: str, v: float) -> float:
    j = prob.names.index(name)
    if not prob.log[j]:
        return float(v)
    if v == -np.inf:
        return 0.0
    return float(10.0**v) if np.isfinite(v) else (np.inf if v > 0 else np.nan)


def _ci(fit: _Fit, ivs: dict[str, _Interval], name: str) -> tuple[float, float]:
    iv = ivs.get(name)
    if iv is None:
        return (np.nan, np.nan)
    return (_to_nat(fit.prob, name, iv.lo), _to_nat(fit.prob, name, iv.hi))


def _recip_ci(ci: tuple[float, float], c: float = 1.0) -> tuple[float, float]:
    lo, hi = ci

    def inv(v):
        if not np.isfinite(v):
            return 0.0 if v == np.inf else np.nan
        return np.inf if v == 0 else c / v

    return (inv(hi), inv(lo))


def _log_delta_ci(fit: _Fit, a: str, b: str, sign_b: int = -1) -> tuple[float, float]:
    """Delta-method interval of 10^(log10 a + sign_b*log10 b) from the covariance."""
    prob = fit.prob
    if fit.cov is None or not fit.cov_ok:
        return (np.nan, np.nan)
    fi = list(prob.free)
    ja, jb = prob.names.index(a), prob.names.index(b)
    if ja not in fi or jb not in fi:
        return (np.nan, np.nan)
    ia, ib = fi.index(ja), fi.index(jb)
    var = fit.cov[ia, ia] + fit.cov[ib, ib] + 2 * sign_b * fit.cov[ia, ib]
    centre = fit.theta[ja] + sign_b * fit.theta[jb]
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
    hi = fhi / klo if klo > 0 else np.inf
    return (lo, hi), ("profile" if "profile" in kinds else "covariance")


# ============================================================== results
@dataclass(frozen=True)
class CurveModel:
    """Enough of a fit to redraw its curves and their confidence band.

    ``cov`` is the covariance of the free parameters in fitted coordinates
    (log10 for ``log`` parameters).
    """

    kind: str
    names: tuple[str, ...]
    values: tuple[float, ...]
    log: tuple[bool, ...]
    free: tuple[bool, ...]
    cov: tuple[tuple[float, ...], ...] | None
    dof: int
    curves: tuple[CurveInfo, ...]
    context: Mapping[str, float] = field(default_factory=dict)
    x_range: Mapping[str, tuple[float, float]] = field(default_factory=dict)

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(c.label for c in self.curves)

    def params(self) -> dict[str, float]:
        return dict(zip(self.names, self.values))

    def _index(self, label: str | None) -> int:
        if label is None:
            if len(self.curves) == 1:
                return 0
            raise ValueError(f"name the curve: one of {list(self.labels)}")
        for i, c in enumerate(self.curves):
            if c.label == label:
                return i
        raise ValueError(f"no curve {label!r}; curves are {list(self.labels)}")

    def _eval(self, theta: np.ndarray, x: np.ndarray, i: int) -> np.ndarray:
        log = np.array(self.log)
        v = np.where(log, 10.0 ** np.where(log, theta, 0.0), theta)
        p = dict(zip(self.names, map(float, v)))
        return CURVE_FUNCTIONS[self.kind](p, x, np.full(x.shape, i, int), self.curves, dict(self.context))

    def _theta(self) -> np.ndarray:
        return np.array([math.log10(v) if lg else v for v, lg in zip(self.values, self.log)], float)

    def predict(self, x, label: str | None = None) -> np.ndarray:
        """The fitted curve ``label`` at ``x`` (SI)."""
        x = np.atleast_1d(np.asarray(x, float))
        return self._eval(self._theta(), x, self._index(label))

    def band(self, x, label: str | None = None, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
        """Pointwise confidence band of the fitted curve (delta method)."""
        x = np.atleast_1d(np.asarray(x, float))
        i = self._index(label)
        th = self._theta()
        y = self._eval(th, x, i)
        if self.cov is None or self.dof <= 0:
            return y * np.nan, y * np.nan
        cov = np.array(self.cov, float)
        free = np.flatnonzero(self.free)
        g = np.empty((x.size, free.size))
        for k, j in enumerate(free):
            h = 1e-6 * max(1.0, abs(th[j]))
            tp, tm = th.copy(), th.copy()
            tp[j] += h
            tm[j] -= h
            g[:, k] = (self._eval(tp, x, i) - self._eval(tm, x, i)) / (2 * h)
        half = _tq(self.dof, level) * np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", g, cov, g), 0.0))
        return y - half, y + half

    def to_dict(self) -> dict:
        return {
            "kind": self.kind,
            "names": list(self.names),
            "values": [float(v) for v in self.values],
            "log": list(self.log),
            "free": list(self.free),
            "cov": None if self.cov is None else [[float(v) for v in row] for row in self.cov],
            "dof": int(self.dof),
            "curves": [c.to_dict() for c in self.curves],
            "context": {k: float(v) for k, v in self.context.items()},
            "x_range": {k: [float(a), float(b)] for k, (a, b) in self.x_range.items()},
        }

    @classmethod
    def from_dict(cls, d: Mapping) -> "CurveModel":
        return cls(
            kind=d["kind"],
            names=tuple(d["names"]),
            values=tuple(float(v) for v in d["values"]),
            log=tuple(bool(v) for v in d["log"]),
            free=tuple(bool(v) for v in d["free"]),
            cov=None if d.get("cov") is None else tuple(tuple(float(v) for v in row) for row in d["cov"]),
            dof=int(d["dof"]),
            curves=tuple(CurveInfo.from_dict(c) for c in d["curves"]),
            context=dict(d.get("context") or {}),
            x_range={k: (float(a), float(b)) for k, (a, b) in (d.get("x_range") or {}).items()},
        )


def _curve_model(fits: Sequence[_Fit]) -> CurveModel:
    """One CurveModel from one fit, or from separate fits of disjoint curves (block covariance)."""
    names, values, logs, frees, covs, dofs = [], [], [], [], [], 0
    curves: list[CurveInfo] = []
    x_range: dict[str, tuple[float, float]] = {}
    ok = True
    for fit in fits:
        p = fit.prob
        nat = p.natural(fit.theta)
        names += p.names
        values += [nat[n] for n in p.names]
        logs += list(map(bool, p.log))
        fr = np.zeros(len(p.names), bool)
        fr[p.free] = True
        frees += list(map(bool, fr))
        covs.append(fit.cov if fit.cov is not None else None)
        ok &= fit.cov is not None
        dofs += fit.dof
        for i, c in enumerate(p.curves):
            curves.append(c)
            xs = p.x[p.idx == i]
            if xs.size:
                x_range[c.label] = (float(xs.min()), float(xs.max()))
    cov = None
    if ok and covs:
        from scipy.linalg import block_diag

        m = block_diag(*covs)
        cov = tuple(tuple(float(v) for v in row) for row in m)
    first = fits[0].prob
    return CurveModel(
        kind=first.kind, names=tuple(names), values=tuple(values), log=tuple(logs), free=tuple(frees),
        cov=cov, dof=int(dofs), curves=tuple(curves), context=dict(first.context), x_range=x_range,
    )


# estimate name -> (JSON key, JSON key of its interval)
JSON_KEYS: dict[str, tuple[str, str]] = {
    "koff": ("koff_per_s", "koff_ci95_per_s"),
    "kon": ("kon_per_M_per_s", "kon_ci95_per_M_per_s"),
    "kd": ("kd_M", "kd_ci95_M"),
    "residence_time": ("residence_time_s", "residence_time_ci95_s"),
    "half_life": ("half_life_s", "half_life_ci95_s"),
    "kobs": ("kobs_per_s", "kobs_ci95_per_s"),
    "residence_time_lower_bound": ("residence_time_lower_bound_s", ""),
    "ki_shift_ratio": ("ki_shift_ratio", "ki_shift_ratio_ci95"),
    "ki": ("ki_M", "ki_ci95_M"),
    "max_response_fraction": ("max_response_fraction", "max_response_fraction_ci95"),
}
ALWAYS_JSON = ("koff", "kon", "kd", "residence_time", "half_life")


def _plain(obj: Any) -> Any:
    """Plain JSON types: numpy scalars to floats, tuples to lists, non-finite floats to None."""
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)


@dataclass(frozen=True)
class FitResult:
    """The outcome of one fit.  Frozen; SI units throughout.

    ``estimates`` maps names (``koff``, ``kon``, ``kd``, ``residence_time``,
    ``half_life``, ``kobs``, per-curve ``name[label]`` ...) to values;
    ``ci95`` maps the same names to (low, high) 95% limits, ``0``/``inf``
    where an interval is open; ``ci_kinds`` says which recipe produced each
    interval.  ``warnings`` holds ``(code, message)`` pairs.
    """

    method: str
    estimates: Mapping[str, float]
    ci95: Mapping[str, tuple[float, float]]
    ci_kind: str
    residual_sd: float
    r_squared: float
    aic: float
    n_points: int
    n_params: int
    success: bool
    warnings: tuple[tuple[str, str], ...] = ()
    ci_kinds: Mapping[str, str] = field(default_factory=dict)
    extras: Mapping[str, Any] = field(default_factory=dict)
    model: CurveModel | None = None
    schema_version: int = SCHEMA_VERSION

    # ---- curves
    @property
    def curve_labels(self) -> tuple[str, ...]:
        return self.model.labels if self.model else ()

    def curve(self, x, label: str | None = None) -> np.ndarray:
        """The fitted curve ``label`` (any curve when the fit has one) at ``x``."""
        if self.model is None:
            raise ValueError("this result stores no curve model")
        return self.model.predict(x, label)

    def band(self, x, label: str | None = None, level: float = 0.95):
        """(low, high) pointwise confidence band of :meth:`curve`."""
        if self.model is None:
            raise ValueError("this result stores no curve model")
        return self.model.band(x, label, level)

    @property
    def warning_codes(self) -> tuple[str, ...]:
        return tuple(c for c, _ in self.warnings)

    # ---- serialisation
    def to_dict(self) -> dict:
        """Everything, as plain JSON types (``from_dict`` restores it)."""
        return _plain(
            {
                "schema_version": self.schema_version,
                "method": self.method,
                "estimates": dict(self.estimates),
                "ci95": {k: list(v) for k, v in self.ci95.items()},
                "ci_kind": self.ci_kind,
                "ci_kinds": dict(self.ci_kinds),
                "residual_sd": self.residual_sd,
                "r_squared": self.r_squared,
                "aic": self.aic,
                "n_points": self.n_points,
                "n_params": self.n_params,
                "success": self.success,
                "warnings": [{"code": c, "message": m} for c, m in self.warnings],
                "extras": dict(self.extras),
                "model": self.model.to_dict() if self.model else None,
            }
        )

    @classmethod
    def from_dict(cls, d: Mapping) -> "FitResult":
        def num(v):
            return np.nan if v is None else float(v)

        def ci(pair, name):
            lo, hi = pair
            lo = num(lo)
            hi = np.inf if hi is None else float(hi)
            if lo != lo and d.get("ci_kinds", {}).get(name) == "profile":
                lo = -np.inf
            return (lo, hi)

        return cls(
            method=d["method"],
            estimates={k: num(v) for k, v in d["estimates"].items()},
            ci95={k: ci(v, k) for k, v in d["ci95"].items()},
            ci_kind=d["ci_kind"],
            residual_sd=num(d["residual_sd"]),
            r_squared=num(d["r_squared"]),
            aic=num(d["aic"]),
            n_points=int(d["n_points"]),
            n_params=int(d["n_params"]),
            success=bool(d["success"]),
            warnings=tuple((w["code"], w["message"]) for w in d["warnings"]),
            ci_kinds=dict(d.get("ci_kinds") or {}),
            extras=dict(d.get("extras") or {}),
            model=CurveModel.from_dict(d["model"]) if d.get("model") else None,
            schema_version=int(d.get("schema_version", SCHEMA_VERSION)),
        )

    def to_json_keys(self) -> dict:
        """The flat JSON contract of ``krt fit --json`` (SI units in the key names)."""
        out: dict[str, Any] = {"schema_version": self.schema_version, "method": self.method}
        for name, (key, ci_key) in JSON_KEYS.items():
            if name in self.estimates or name in ALWAYS_JSON:
                out[key] = self.estimates.get(name)
                if ci_key:
                    ci = self.ci95.get(name)
                    out[ci_key] = list(ci) if ci is not None else None
        out.update(
            {
                "ci_kind": self.ci_kind,
                "warnings": [{"code": c, "message": m} for c, m in self.warnings],
                "n_points": self.n_points,
                "n_params": self.n_params,
                "r_squared": self.r_squared,
                "residual_sd": self.residual_sd,
                "aic": self.aic,
                "success": self.success,
                "estimates": dict(self.estimates),
                "ci95": {k: list(v) for k, v in self.ci95.items()},
            }
        )
        for k in ("rt_is_lower_bound", "incubation_short_s", "incubation_long_s", "kobs_line", "two_phase"):
            if k in self.extras:
                out[k] = self.extras[k]
        return _plain(out)


class _Builder:
    """Collects estimates, intervals and warnings while a fit_* function runs."""

    def __init__(self, method: str):
        self.method = method
        self.estimates: dict[str, float] = {}
        self.ci95: dict[str, tuple[float, float]] = {}
        self.kinds: dict[str, str] = {}
        self.warnings: list[tuple[str, str]] = []
        self.extras: dict[str, Any] = {}

    def put(self, name: str, value: float, ci=None, kind: str | None = None):
        self.estimates[name] = float(value)
        if ci is not None:
            self.ci95[name] = (float(ci[0]), float(ci[1]))
            if kind:
                self.kinds[name] = kind

    def put_params(self, fit: _Fit, ivs: dict[str, _Interval], names: Iterable[str] | None = None):
        nat = fit.prob.natural(fit.theta)
        for j, name in enumerate(fit.prob.names):
            if names is not None and name not in names:
                continue
            if j in fit.prob.free:
                iv = ivs.get(name)
                ci = _ci(fit, ivs, name)
                self.put(name, nat[name], ci, iv.kind if iv else None)
                if iv is not None and iv.kind == "profile" and (not np.isfinite(iv.lo) or not np.isfinite(iv.hi)):
                    self.warn("ci-open", f"the 95% interval of {name} reaches the fitting limit on one side: "
                              "the data do not bound it there")
            else:
                self.estimates[name] = nat[name]

    def warn(self, code: str, message: str):
        if (code, message) not in self.warnings:
            self.warnings.append((code, message))

    def bound_warnings(self, fit: _Fit):
        p = fit.prob
        for jf, j in enumerate(p.free):
            if fit.active[jf] and p.key[j]:
                v = _to_nat(p, p.names[j], fit.theta[j])
                self.warn("at-limit", f"{p.names[j]} = {v:.3g} sits at its fitting limit: the data do not determine it")

    def result(self, fits: Sequence[_Fit], model_fits: Sequence[_Fit] | None = None) -> FitResult:
        n = sum(f.n for f in fits)
        k = sum(f.k for f in fits)
        ssr = sum(f.ssr for f in fits)
        sst = sum(float(np.sum((f.prob.y - f.prob.y.mean()) ** 2)) for f in fits)
        dof = n - k
        kinds = set(self.kinds.values())
        ci_kind = "profile" if "profile" in kinds else "covariance"
        aic = n * math.log(max(ssr, 1e-300) / n) + 2 * k
        self.extras.setdefault("aicc", aic + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else np.inf))
        self.extras.setdefault("ssr", ssr)
        return FitResult(
            method=self.method,
            estimates=dict(self.estimates),
            ci95=dict(self.ci95),
            ci_kind=ci_kind,
            residual_sd=math.sqrt(ssr / dof) if dof > 0 else np.nan,
            r_squared=1.0 - ssr / sst if sst > 0 else np.nan,
            aic=aic,
            n_points=n,
            n_params=k,
            success=all(f.success for f in fits),
            warnings=tuple(self.warnings),
            ci_kinds=dict(self.kinds),
            extras=_plain(self.extras),
            model=_curve_model(model_fits or fits),
        )


# ============================================================== data helpers
def _arrays(x, y, what: str = "time") -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, float).ravel()
    y = np.asarray(y, float).ravel()
    if x.size != y.size:
        raise FitError(f"{what} and signal differ in length ({x.size} vs {y.size})")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise FitError(f"{what} and signal must be finite numbers")
    if what == "time" and np.any(x < 0):
        raise FitError("times must not be negative (time zero is the start of the experiment)")
    if what == "concentration" and np.any(x < 0):
        raise FitError("concentrations must not be negative")
    return x, y


def _label_text(v: float, unit: str) -> str:
    """A readable curve label: concentrations in the handiest of fM..mM (``'0.1 nM'``), else ``value unit``."""
    if unit == "M" and v > 0:
        return fmt_conc(v, 4)
    return f"{v:.4g} {unit}"


def _group(n: int, labels=None, conc=None, control_label: str | None = None, sort_by_conc: bool = True):
    """Curves and per-point curve index from optional labels and concentrations.

    Curves keep the order of first appearance (labels) or of concentration.
    """
    conc_arr = None if conc is None else np.broadcast_to(np.asarray(conc, float), (n,)).copy()
    if conc_arr is not None and np.any(~np.isfinite(conc_arr) | (conc_arr < 0)):
        raise FitError("concentrations must be finite and not negative")
    if labels is not None:
        lab = np.broadcast_to(np.asarray(labels), (n,))
        if lab.dtype.kind not in "US":
            lab = np.array([str(v) for v in lab])
        uniq, first, inv = np.unique(lab, return_index=True, return_inverse=True)
        order = np.argsort(first, kind="stable")
        rank = np.empty_like(order)
        rank[order] = np.arange(order.size)
        idx = rank[inv.ravel()]
        names = [str(v) for v in uniq[order]]
    elif conc_arr is not None:
        vals, idx = np.unique(conc_arr, return_inverse=True)
        idx = idx.ravel()
        names = [_label_text(v, "M") for v in vals]
    else:
        idx = np.zeros(n, int)
        names = ["all"]
    nc = len(names)
    cvals = np.full(nc, np.nan)
    if conc_arr is not None:
        lo = np.full(nc, np.inf)
        hi = np.full(nc, -np.inf)
        np.minimum.at(lo, idx, conc_arr)
        np.maximum.at(hi, idx, conc_arr)
        bad = np.flatnonzero(lo != hi)
        if bad.size:
            i = int(bad[0])
            raise FitError(f"curve {names[i]!r} has more than one concentration ({lo[i]:.3g} and {hi[i]:.3g} M)")
        cvals = lo
    ctl = control_label.lower() if control_label is not None else None
    curves = [CurveInfo(name, float(cvals[i]), "control" if ctl is not None and name.strip().lower() == ctl else "sample")
              for i, name in enumerate(names)]
    if labels is not None and conc_arr is not None and sort_by_conc:
        order_i = sorted(range(nc), key=lambda i: (curves[i].role != "control", curves[i].conc))
        remap = np.empty(nc, int)
        remap[order_i] = np.arange(nc)
        curves = [curves[i] for i in order_i]
        idx = remap[idx]
    return tuple(curves), np.asarray(idx, int)


def _min_points(n: int, k: int, method: str, idx=None, per_curve: int = 3):
    if n < k + 2:
        raise FitError(f"too few points for {method}: {n} points for {k} parameters (need at least {k + 2})")
    if idx is not None:
        counts = np.bincount(idx)
        if np.any(counts < per_curve):
            raise FitError(f"too few points for {method}: a curve has {int(counts.min())} points (need at least {per_curve})")


def _not_constant(y: np.ndarray, method: str):
    if np.ptp(y) <= 1e-12 * max(1.0, float(np.max(np.abs(y)))):
        raise FitError(f"the signal is constant: nothing to fit for {method}")


def _rate_grid(t: np.ndarray, n: int = 40, lims=KOFF_LIMITS) -> np.ndarray:
    tp = np.unique(t[t > 0])
    if tp.size == 0:
        raise FitError("all times are zero")
    tmax = tp.max()
    dt = tp.min() if tp.size == 1 else min(tp.min(), float(np.min(np.diff(tp))))
    lo = max(0.05 / tmax, lims[0] * 10)
    hi = min(10.0 / dt, lims[1] / 10)
    if hi <= lo:
        hi = lo * 100
    return np.geomspace(lo, hi, n)


def _solve_linear(A: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Least-squares coefficients: scaled normal equations when well conditioned, else SVD."""
    if A.shape[1] == 2:  # the common case (shape + offset): explicit 2x2 solve
        a0, a1 = A[:, 0], A[:, 1]
        g00, g01, g11 = a0 @ a0, a0 @ a1, a1 @ a1
        if g00 > 0 and g11 > 0 and np.isfinite(g00 + g11) and 1.0 - g01 * g01 / (g00 * g11) > 1e-9:
            b0, b1 = a0 @ y, a1 @ y
            det = g00 * g11 - g01 * g01
            return np.array([(g11 * b0 - g01 * b1) / det, (g00 * b1 - g01 * b0) / det])
        coef, *_ = np.linalg.lstsq(A, y, rcond=None)
        return coef
    G = A.T @ A
    d = np.sqrt(np.diag(G))
    if np.all(d > 0) and np.all(np.isfinite(d)):
        Gs = G / np.outer(d, d)
        w = np.linalg.eigvalsh(Gs)
        if w[0] > 1e-9 * w[-1]:
            return np.linalg.solve(Gs, (A.T @ y) / d) / d
    coef, *_ = np.linalg.lstsq(A, y, rcond=None)
    return coef


def _lin(A: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, float]:
    coef = _solve_linear(A, y)
    r = A @ coef - y
    return coef, float(r @ r)


def _ind(idx: np.ndarray, i: int) -> np.ndarray:
    return (idx == i).astype(float)


def _check_strict(fits: Sequence[_Fit], strict: bool, b: _Builder):
    for f in fits:
        if not f.success:
            msg = f"the {b.method} fit did not converge ({f.message.rstrip('.')})"
            if strict:
                raise FitError(msg)
            b.warn("not-converged", msg)


def _kon_check(b: _Builder, kon: float):
    if kon > 1e9:
        b.warn("kon-above-practical", f"kon {kon:.3g} /M/s is above ~1e9 /M/s, near the diffusion limit "
               "(practical ceilings 1e8-1e9 /M/s, from memory); check units and concentrations")


def _rate_summary(b: _Builder, koff: float, ci: tuple[float, float], kind: str):
    b.put("koff", koff, ci, kind)
    b.put("residence_time", 1.0 / koff, _recip_ci(ci), kind)
    b.put("half_life", LN2 / koff, _recip_ci(ci, LN2), kind)


def _rt_lower_bound(b: _Builder, koff_ci: tuple[float, float], why: str):
    bound = _recip_ci(koff_ci)[0]
    b.estimates["residence_time_lower_bound"] = float(bound)
    b.extras["rt_is_lower_bound"] = True
    b.warn("rt-lower-bound", f"{why}; report the residence time as at least {bound:.3g} s "
           "(1/upper 95% limit of koff), not as a value")


# ============================================================== dissociation
def fit_dissociation(
    t, signal, curve=None, *, check_biphasic: bool = True, intervals: str = "auto",
    lower_bound_fraction: float = RT_LOWER_BOUND_FRACTION, max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """One-phase dissociation to a plateau: Y = plateau + span*exp(-koff*t).

    Several curves (``curve`` labels) share koff and keep their own span and
    plateau.  Reports ``koff``, ``residence_time`` = 1/koff (Copeland, Pompliano
    & Meek 2006, Nat Rev Drug Discov 5:730) and ``half_life`` = ln2/koff.

    Warnings
    --------
    ``rt-lower-bound``
        less than ``lower_bound_fraction`` of the starting signal dissociated in
        the window and the decay had not levelled off: the plateau cannot be
        estimated, so koff is refitted with the signal decaying to zero
        (background-subtracted specific binding) and
        ``residence_time_lower_bound`` = 1/(upper 95% limit of koff) is added.
    ``biphasic``
        a two-phase decay is clearly better (extra-sum-of-squares F test
        p < 0.001 and AICc lower by more than 6).
    ``small-amplitude``, ``fast-vs-sampling``, ``at-limit``, ``ci-open``.
    """
    method = "dissociation"
    t, y = _arrays(t, signal)
    curves, idx = _group(t.size, curve)
    nc = len(curves)
    _min_points(t.size, 1 + 2 * nc, method, idx, per_curve=4)
    _not_constant(y, method)

    def design(k, plateau=True):
        cols = []
        for i in range(nc):
            m = _ind(idx, i)
            cols.append(m * np.exp(-k * t))
            if plateau:
                cols.append(m)
        return np.column_stack(cols)

    def make(koff0, pairs, plateau_free=True):
        """pairs: flat [span, plateau] per curve."""
        ps = [Param("koff", koff0, log=True, lower=KOFF_LIMITS[0], upper=KOFF_LIMITS[1], key=True)]
        for i, c in enumerate(curves):
            ps.append(Param(f"span[{c.label}]", pairs[2 * i]))
            ps.append(Param(f"plateau[{c.label}]", pairs[2 * i + 1] if plateau_free else 0.0, fixed=not plateau_free))
        return _Problem("one-phase-decay", ps, t, y, idx, curves)

    grid = _rate_grid(t)
    scored = sorted(((_lin(design(k), y)[1], k) for k in grid))
    starts_k = [k for _, k in scored[:3]]
    prob = make(starts_k[0], _lin(design(starts_k[0]), y)[0])

    def pairs(c, plateau=True):
        out = {}
        for i, cv in enumerate(curves):
            out[f"span[{cv.label}]"] = float(c[2 * i] if plateau else c[i])
            if plateau:
                out[f"plateau[{cv.label}]"] = float(c[2 * i + 1])
        return out

    fit = _run_vp(prob, ["koff"], lambda p: design(p["koff"]), pairs, [[math.log10(k)] for k in starts_k], max_nfev)

    b = _Builder(method)
    koff = fit.value("koff")
    tmax = float(t.max())
    y0 = np.array([fit.value(f"span[{c.label}]") + fit.value(f"plateau[{c.label}]") for c in curves])
    tend = np.array([t[idx == i].max() for i in range(nc)])
    drop = np.array([fit.value(f"span[{c.label}]") for c in curves]) * -np.expm1(-koff * tend)
    with np.errstate(divide="ignore", invalid="ignore"):
        observed = float(np.nanmean(np.where(y0 > 0, drop / y0, np.nan)))
    completion = float(-np.expm1(-koff * tmax))
    b.extras["fraction_dissociated"] = observed
    b.extras["decay_completion"] = completion

    lower_bound = np.isfinite(observed) and observed < lower_bound_fraction and completion < 0.95
    if lower_bound:
        b.extras["free_plateau_koff"] = koff
        cons_starts = []
        for k in starts_k + [koff]:
            k = float(np.clip(k, KOFF_LIMITS[0] * 2, KOFF_LIMITS[1] / 2))
            spans = _lin(design(k, plateau=False), y)[0]
            cons_starts.append(np.r_[math.log10(k), np.column_stack([spans, np.zeros(nc)]).ravel()])
        prob = make(10 ** cons_starts[0][0], cons_starts[0][1:], plateau_free=False)
        fit = _run_vp(prob, ["koff"], lambda p: design(p["koff"], plateau=False), lambda c: pairs(c, False),
                      [[z[0]] for z in cons_starts], max_nfev)
        koff = fit.value("koff")
    elif np.isfinite(observed) and observed < lower_bound_fraction:
        b.warn("small-amplitude", f"only {100 * observed:.0f}% of the starting signal dissociated before the "
               "plateau: check non-specific binding, an irreversible fraction or a second slow phase")

    _check_strict([fit], strict, b)
    ivs = _intervals(fit, intervals)
    b.put_params(fit, ivs)
    b.bound_warnings(fit)
    koff_ci = _ci(fit, ivs, "koff")
    _rate_summary(b, koff, koff_ci, ivs["koff"].kind)
    if lower_bound:
        _rt_lower_bound(b, koff_ci, f"only {100 * max(observed, 0):.0f}% of the signal dissociated within the "
                        f"{tmax:.4g} s window, so koff was fitted assuming the signal decays to zero "
                        "(background-subtracted)")

    tp = np.unique(t[t > 0])
    if tp.size and koff * tp.min() > 2.0:
        b.warn("fast-vs-sampling", f"about {100 * -np.expm1(-koff * tp.min()):.0f}% of the decay happened before "
               "the first reading after time zero: sample faster")

    if check_biphasic and not lower_bound and np.all(np.bincount(idx) >= 8):
        _biphasic_check(b, fit, t, y, idx, curves, max_nfev)
    return b.result([fit])


def _biphasic_check(b: _Builder, fit1: _Fit, t, y, idx, curves, max_nfev):
    nc = len(curves)
    grid = _rate_grid(t, 18)

    def design(k1, k2):
        cols = []
        for i in range(nc):
            m = _ind(idx, i)
            cols += [m * np.exp(-k1 * t), m * np.exp(-k2 * t), m]
        return np.column_stack(cols)

    best = None
    for a in range(grid.size):
        for c in range(a + 2, grid.size):
            coef, ssr = _lin(design(grid[c], grid[a]), y)
            if best is None or ssr < best[0]:
                best = (ssr, grid[c], grid[a], coef)
    _, kf, ks, coef = best
    # variable projection: only the two rates are iterated, the amplitudes and
    # plateaus are solved exactly at every step (Golub & Pereyra 1973, from memory)
    lo, hi = math.log10(KOFF_LIMITS[0]), math.log10(KOFF_LIMITS[1])

    def resid(z):
        A = design(10 ** z[0], 10 ** z[1])
        c, *_ = np.linalg.lstsq(A, y, rcond=None)
        return A @ c - y

    k1 = fit1.value("koff")
    best2 = None
    for z0 in ((math.log10(kf), math.log10(ks)), (math.log10(k1 * 3), math.log10(k1 / 3))):
        z0 = np.clip(z0, lo + 1e-6, hi - 1e-6)
        try:
            res = optimize.least_squares(resid, z0, bounds=(lo, hi), method="trf", ftol=1e-10, xtol=1e-10,
                                         max_nfev=max_nfev or 200)
        except ValueError:
            continue
        if best2 is None or res.cost < best2.cost:
            best2 = res
    if best2 is None:
        return
    ssr2 = 2.0 * float(best2.cost)
    coef2, _ = _lin(design(10 ** best2.x[0], 10 ** best2.x[1]), y)
    k2 = 2 + 3 * nc
    df1, df2 = fit1.dof, fit1.n - k2
    if df2 <= 0 or ssr2 <= 0 or ssr2 >= fit1.ssr:
        return
    F = ((fit1.ssr - ssr2) / (df1 - df2)) / (ssr2 / df2)
    p = float(stats.f.sf(F, df1 - df2, df2))
    n = fit1.n

    def aicc(ssr, k):
        return n * math.log(ssr / n) + 2 * k + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else np.inf)

    d_aicc = aicc(fit1.ssr, fit1.k) - aicc(ssr2, k2)
    ka, kb = 10 ** best2.x[0], 10 ** best2.x[1]
    fast, slow = (ka, kb) if ka >= kb else (kb, ka)
    sa = float(sum(coef2[3 * i] for i in range(nc)))
    sb = float(sum(coef2[3 * i + 1] for i in range(nc)))
    s_fast, s_slow = (sa, sb) if ka >= kb else (sb, sa)
    total = s_fast + s_slow
    frac_slow = s_slow / total if total != 0 else np.nan

    b.extras["two_phase"] = {"k_fast_per_s": fast, "k_slow_per_s": slow, "slow_fraction": frac_slow,
                             "f_test_p": p, "delta_aicc": d_aicc}
    distinct = fast / slow > 2.0 and 0.05 < frac_slow < 0.95
    if p < BIPHASIC_P and d_aicc > BIPHASIC_DAICC and distinct:
        b.warn("biphasic", f"a two-phase decay fits clearly better (F test p = {p:.2g}, AICc lower by {d_aicc:.1f}): "
               f"fast {fast:.3g} /s, slow {slow:.3g} /s ({100 * frac_slow:.0f}% slow); the one-phase koff averages "
               "two processes (second site, rebinding, induced fit or a mixture) and the slow phase's residence "
               f"time is {1 / slow:.3g} s")


# ============================================================== association
def _run_rise(t, y, max_nfev=None) -> _Fit:
    """One-phase rise Y = y0 + A*(1 - exp(-kobs*t)) of one curve."""
    grid = _rate_grid(t)
    curves, idx = (CurveInfo("all"),), np.zeros(t.size, int)

    def design(k):
        return np.column_stack([-np.expm1(-k * t), np.ones_like(t)])

    scored = sorted((_lin(design(k), y)[1], k) for k in grid)
    starts = [np.r_[math.log10(k), _lin(design(k), y)[0]] for _, k in scored[:3]]
    k0 = scored[0][1]
    c0 = _lin(design(k0), y)[0]
    ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True), Param("amplitude", c0[0]), Param("y0", c0[1])]
    return _run_vp(_Problem("one-phase-association", ps, t, y, idx, curves), ["kobs"], lambda p: design(p["kobs"]),
                   lambda c: {"amplitude": c[0], "y0": c[1]}, [[z[0]] for z in starts], max_nfev)


def fit_association(
    t, signal, conc=None, curve=None, *, koff: float | None = None, intervals: str = "auto",
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
                b.warn("kobs-below-koff", f"kobs {kobs:.3g} /s is not above the given koff {koff:.3g} /s: kon cannot "
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
        if not f_i.cov_ok or bool(np.any(f_i.active)):
            continue
        se = math.sqrt(f_i.cov[0, 0]) * math.log(10) * k_i
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

    def lin_part(kon, kf):
        kd = kf / kon
        shape = Lp / (Lp + kd) * -np.expm1(-(kon * Lp + kf) * t)
        return _lin(np.column_stack([shape, np.ones_like(t)]), y)

    # candidates: the kobs line's slope/intercept, plus a coarse grid (kon x koff) for data sets
    # whose single-curve fits say little; Bmax and baseline solved exactly for each
    kon_guesses += list(np.geomspace(1e3, 1e9, 13))
    if koff is None:
        koff_guesses += list(_rate_grid(t, 10))
    starts = []
    for kon0 in kon_guesses:
        for kf0 in koff_guesses:
            coef, ssr = lin_part(kon0, kf0)
            if np.isfinite(ssr):
                starts.append((ssr, kon0, kf0, coef))
    starts.sort(key=lambda s: s[0])
    distinct_starts: list = []
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

    def g_design(p):
        kd = p["koff"] / p["kon"]
        return np.column_stack([Lp / (Lp + kd) * -np.expm1(-(p["kon"] * Lp + p["koff"]) * t), np.ones_like(t)])

    fit = _run_vp(prob, nl, g_design, lambda c: {"bmax": c[0], "baseline": c[1]},
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


def _kobs_line(b: _Builder, per: list) -> dict | None:
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
    out = {"concentrations_M": L, "kobs_per_s": k, "kobs_se_per_s": se, "labels": [p[3] for p in per],
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
        def wssr(X):
            c, *_ = np.linalg.lstsq(X * W[:, None], k * W, rcond=None)
            r = (k - X @ c) * W
            return float(r @ r), c

        ssr_line = wssr(X)[0]
        best = (np.inf, np.nan, None)
        for K in np.geomspace(L.min() / 30.0, L.max() * 300.0, 80):
            ssr_h, c = wssr(np.column_stack([np.ones_like(L), L / (K + L)]))
            if ssr_h < best[0]:
                best = (ssr_h, K, c)
        ssr_h, K, c = best
        if n > 3 and ssr_h > 0 and c is not None and c[1] > 0 and K < 3.0 * L.max():
            F = (ssr_line - ssr_h) / (ssr_h / (n - 3))
            p = float(stats.f.sf(F, 1, n - 3))
            out.update({"curvature_p": p, "saturation_K_M": K, "kobs_max_per_s": float(c[0] + c[1])})
            if p < 0.01:
                b.warn("kobs-curved", f"kobs rises less than linearly with concentration (saturating, F test p = "
                       f"{p:.2g}): suggests a two-step (induced-fit) mechanism; kon and koff from a one-step model "
                       "are apparent values (Vauquelin 2016, Br J Pharmacol 173:1268)")
    b.extras["kobs_line"] = out
    return out


# ============================================================== competition kinetics
def fit_competition_kinetics(
    t, signal, competitor_conc, *, tracer_kon: float, tracer_koff: float, tracer_conc: float,
    curve=None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Competitor kon (k3) and koff (k4) from tracer binding with competitor (Motulsky & Mahan 1984).

    Tracer and competitor are added together at t = 0; curves at several
    competitor concentrations (0 = tracer alone) are fitted globally with the
    tracer's k1, k2 and concentration fixed, and k3, k4, Bmax and a baseline
    shared (specific binding, no depletion; Motulsky & Mahan 1984, Mol
    Pharmacol 25:1-9).  ``kd`` is the kinetic Ki = k4/k3.

    Warnings
    --------
    ``slow-competitor``
        k4 * (window) < 1: little competitor dissociation in the window, k4 is
        poorly determined (Georgi et al. 2019, Br J Pharmacol 176:4731).
    ``fast-competitor``
        k4 > 10x the tracer's kobs: only Ki (not k3, k4) is well determined.
    ``kon-above-practical``, ``at-limit``, ``ci-open``.
    """
    method = "competition-kinetics"
    t, y = _arrays(t, signal)
    for name, v in (("tracer kon", tracer_kon), ("tracer koff", tracer_koff), ("tracer concentration", tracer_conc)):
        if v is None or not (np.isfinite(v) and v > 0):
            raise FitError(f"competition kinetics needs the {name} (a positive number)")
    _not_constant(y, method)
    curves, idx = _group(t.size, curve, competitor_conc)
    concs = np.array([c.conc for c in curves])
    if not np.any(concs > 0):
        raise FitError("competition kinetics needs at least one curve with competitor (concentration > 0)")
    _min_points(t.size, 4, method, idx, per_curve=3)
    ctx = {"tracer_kon": float(tracer_kon), "tracer_koff": float(tracer_koff), "tracer_conc": float(tracer_conc)}

    def shape(k3, k4):
        return fm.motulsky_mahan_levels(t, idx, tracer_conc, tracer_kon, tracer_koff, concs, k3, k4, 1.0)

    # starting values: a 12 x 12 grid over (koff, Ki), evaluated at once on the distinct
    # (concentration, time) pairs, with Bmax and baseline solved in closed form per grid point
    k4_grid = _rate_grid(t, 12)
    ipos = concs[concs > 0]
    ki_grid = np.geomspace(ipos.min() / 300.0, ipos.max() * 10.0, 12)
    K4, KI = np.meshgrid(k4_grid, ki_grid, indexing="ij")
    K4 = K4.ravel()
    K3 = np.clip(K4 / KI.ravel(), KON_LIMITS[0] * 10, KON_LIMITS[1] / 10)
    tu, tinv = np.unique(t, return_inverse=True)
    W = np.zeros((concs.size, tu.size))
    Y = np.zeros_like(W)
    np.add.at(W, (idx, tinv), 1.0)
    np.add.at(Y, (idx, tinv), y)
    with np.errstate(all="ignore"):
        c0, c1, kf, c2, ks = (a[..., None] for a in fm.motulsky_mahan_coefficients(
            tracer_conc, tracer_kon, tracer_koff, concs[None, :], K3[:, None], K4[:, None]))
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
    cand = [(ssr[i], K3[i], K4[i], (slope[i], icpt[i])) for i in chosen]
    _, k30, k40, c0 = cand[0]
    ones = np.ones_like(t)
    ps = [
        Param("kon", k30, True, *KON_LIMITS, key=True),
        Param("koff", k40, True, *KOFF_LIMITS, key=True),
        Param("bmax", c0[0]),
        Param("baseline", c0[1]),
    ]
    prob = _Problem("motulsky-mahan", ps, t, y, idx, curves, ctx)
    fit = _run_vp(prob, ["kon", "koff"], lambda p: np.column_stack([shape(p["kon"], p["koff"]), ones]),
                  lambda c: {"bmax": c[0], "baseline": c[1]},
                  [[math.log10(a), math.log10(c_)] for _, a, c_, _co in cand[:3]], max_nfev)
    b = _Builder(method)
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
    tmax = float(t.max())
    ka = tracer_kon * tracer_conc + tracer_koff
    b.extras.update({"tracer_kobs_per_s": ka, "window_s": tmax, "koff_times_window": k4 * tmax})
    if k4 * tmax < 1.0:
        b.warn("slow-competitor", f"koff x window = {k4 * tmax:.2g} < 1: the competitor barely dissociates within "
               "the experiment, so koff is poorly determined; lengthen the window (Georgi et al. 2019, "
               "Br J Pharmacol 176:4731)")
    if k4 > 10.0 * ka:
        b.warn("fast-competitor", f"the competitor's koff ({k4:.3g} /s) is more than 10x the tracer's kobs "
               f"({ka:.3g} /s): the curves mostly show the equilibrium shift, so only Ki = koff/kon is well "
               "determined (Georgi et al. 2019)")
    return b.result([fit])


# ============================================================== jump dilution
def fit_jump_dilution(
    t, product, curve=None, *, control_label: str = "control", post_dilution_conc: float | None = None,
    kapp: float | None = None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
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

    Warnings: ``kobs-not-koff`` (or ``koff-corrected``), ``no-control``, ``vs-differs-from-control``,
    ``rt-lower-bound``, ``weak-initial-inhibition``, ``at-limit``, ``ci-open``.
    """
    method = "jump-dilution"
    t, y = _arrays(t, product)
    _not_constant(y, method)
    if (post_dilution_conc is None) != (kapp is None):
        raise FitError("the koff correction needs both the post-dilution inhibitor concentration and Kapp")
    if kapp is not None and not (kapp > 0 and post_dilution_conc >= 0):
        raise FitError("Kapp must be positive and the post-dilution concentration not negative")
    curves, idx = _group(t.size, curve, None, control_label)
    samples = [i for i, c in enumerate(curves) if c.role != "control"]
    controls = [i for i, c in enumerate(curves) if c.role == "control"]
    if not samples:
        raise FitError(f"jump dilution needs at least one inhibited curve (a curve not labelled {control_label!r})")
    _min_points(t.size, 2 + len(curves) + len(samples), method, idx, per_curve=3)
    is_ctrl = np.isin(idx, controls)
    scale = 1.0 / (1.0 + post_dilution_conc / kapp) if kapp is not None else 1.0
    ctx = {"vs_scale": scale}

    def design(k, separate):
        g = -np.expm1(-k * t) / k
        if separate:  # the inhibited curves' final rate free
            cols = [np.where(is_ctrl, t, 0.0), np.where(is_ctrl, 0.0, t - g)]
        else:  # the control fixes it: vs_inhibited = vs*scale
            cols = [np.where(is_ctrl, t, scale * (t - g))]
        cols += [_ind(idx, i) for i in range(len(curves))]  # p0
        cols += [_ind(idx, i) * g for i in samples]  # vi
        return np.column_stack(cols)

    def fit_mode(separate):
        grid = _rate_grid(t)
        scored = sorted((_lin(design(k, separate), y)[1], k) for k in grid)
        starts = [np.r_[math.log10(k), _lin(design(k, separate), y)[0]] for _, k in scored[:3]]
        k0 = scored[0][1]
        c0 = _lin(design(k0, separate), y)[0]
        ps = [Param("kobs", k0, True, *KOFF_LIMITS, key=True), Param("vs", c0[0])]
        if separate:
            ps.append(Param("vs_inhibited", c0[1]))
        off = 1 + separate
        ps += [Param(f"p0[{c.label}]", c0[off + i]) for i, c in enumerate(curves)]
        ps += [Param(f"vi[{curves[i].label}]", c0[off + len(curves) + n]) for n, i in enumerate(samples)]
        names = [q.name for q in ps[1:]]
        return _run_vp(_Problem("jump-dilution", ps, t, y, idx, curves, ctx), ["kobs"],
                       lambda p: design(p["kobs"], separate), lambda c: dict(zip(names, map(float, c))),
                       [[z[0]] for z in starts], max_nfev)

    fit = fit_mode(separate=False)
    b = _Builder(method)
    if controls and fit.value("kobs") * float(t.max()) >= 1.5:
        # is the final rate of the inhibited curves really the control's?  (extra-sum-of-squares F test)
        try:
            alt = fit_mode(separate=True)
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
        factor = 1.0 + post_dilution_conc / kapp
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
    t, response, curve=None, *, control_label: str = "control", intervals: str = "auto",
    max_nfev: int | None = None, strict: bool = True,
) -> FitResult:
    """Response recovering after washout: R = Rmax*(1 - f*exp(-koff*t)).

    Time zero is the washout.  Curves share koff and Rmax and keep their own
    blocked fraction f; curves labelled ``control_label`` (no compound) are
    flat at Rmax and fix it.  Assumes free compound is gone after the wash and
    a linear occupancy-response relation; rebinding in tissue slows the
    apparent recovery (Vauquelin & Charlton 2010, Br J Pharmacol 161:488).

    Warnings: ``rt-lower-bound``, ``no-control``, ``at-limit``, ``ci-open``.
    """
    method = "washout-recovery"
    t, y = _arrays(t, response)
    _not_constant(y, method)
    curves, idx = _group(t.size, curve, None, control_label)
    samples = [i for i, c in enumerate(curves) if c.role != "control"]
    controls = [i for i, c in enumerate(curves) if c.role == "control"]
    if not samples:
        raise FitError(f"washout recovery needs at least one treated curve (not labelled {control_label!r})")
    _min_points(t.size, 2 + len(samples), method, idx, per_curve=3)

    def design(k):
        e = np.exp(-k * t)
        return np.column_stack([np.ones_like(t)] + [-_ind(idx, i) * e for i in samples])

    grid = _rate_grid(t)
    scored = sorted((_lin(design(k), y)[1], k) for k in grid)

    def start(k):
        c = _lin(design(k), y)[0]
        rmax = c[0] if c[0] != 0 else 1.0
        return np.r_[math.log10(k), rmax, c[1:] / rmax]

    starts = [start(k) for _, k in scored[:3]]
    s0 = starts[0]
    ps = [Param("koff", 10 ** s0[0], True, *KOFF_LIMITS, key=True), Param("rmax", s0[1])]
    ps += [Param(f"fraction[{curves[i].label}]", s0[2 + n], key=True) for n, i in enumerate(samples)]
    prob = _Problem("washout-recovery", ps, t, y, idx, curves)
    fnames = [q.name for q in ps[2:]]

    def w_assemble(c):
        rmax = float(c[0]) if c[0] != 0 else 1e-300
        return {"rmax": rmax, **{n: float(v) / rmax for n, v in zip(fnames, c[1:])}}

    fit = _run_vp(prob, ["koff"], lambda p: design(p["koff"]), w_assemble, [[z[0]] for z in starts], max_nfev)
    b = _Builder(method)
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


# ============================================================== dose-response helpers
def _logistic_fit(x, y, label: str, max_nfev=None) -> _Fit:
    xp = x[x > 0]
    if xp.size < 2:
        raise FitError(f"curve {label!r} needs at least two positive doses")
    lo, hi = float(xp.min()), float(xp.max())
    grid = np.geomspace(lo / 10, hi * 10, 30)
    cand = []
    for h in (0.7, 1.0, 1.5):
        for c in grid:
            s = 1.0 / (1.0 + (x / c) ** h)  # top weight; bottom weight = 1 - s
            coef, ssr = _lin(np.column_stack([1 - s, s]), y)
            cand.append((ssr, c, h, coef))
    cand.sort(key=lambda c: c[0])
    _, c0, h0, (bot, top) = cand[0]
    curves = (CurveInfo(label),)
    ps = [Param(f"bottom[{label}]", bot), Param(f"top[{label}]", top),
          Param(f"ic50[{label}]", c0, True, *IC50_LIMITS, key=True), Param(f"hill[{label}]", h0, False, *HILL_LIMITS)]
    prob = _Problem("logistic4", ps, x, y, np.zeros(x.size, int), curves)

    def l_design(p):
        s_ = 1.0 / (1.0 + (x / p[f"ic50[{label}]"]) ** p[f"hill[{label}]"])
        return np.column_stack([1 - s_, s_])

    return _run_vp(prob, [f"ic50[{label}]", f"hill[{label}]"], l_design,
                   lambda c: {f"bottom[{label}]": c[0], f"top[{label}]": c[1]},
                   [[math.log10(c), h] for _, c, h, _co in cand[:3]], max_nfev)


# ============================================================== Ki shift
def fit_ki_shift(
    dose, signal, incubation, *, tracer_conc: float | None = None, tracer_kd: float | None = None,
    labels=None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
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
        if tracer_conc is not None:
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
    if tracer_conc is not None:
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
    from ..units import fmt_time

    return fmt_time(float(s))


# ============================================================== insurmountability
def fit_insurmountability(
    dose, response, curve, *, control_label: str = "control", insurmountable_below: float = 0.9,
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


# ============================================================== table dispatcher
def fit_table(method: str, df, **options) -> FitResult:
    """Fit ``method`` to a validated SI table (columns ``time``/``concentration``,
    ``signal``, optional ``curve`` and ``incubation``).

    ``options``: ``tracer_kon``, ``tracer_koff``, ``tracer_conc``, ``tracer_kd``,
    ``koff``, ``post_dilution_conc``, ``kapp``, ``control_label`` (SI floats).
    """
    if method not in METHODS:
        raise FitError(f"unknown fit method {method!r}; choose one of {', '.join(METHODS)}")
    cols = set(df.columns)
    curve = df["curve"].to_numpy(object) if "curve" in cols else None
    conc = df["concentration"].to_numpy(float) if "concentration" in cols else None
    y = df["signal"].to_numpy(float)
    ctrl = options.get("control_label") or "control"

    def need(col):
        if col not in cols:
            raise FitError(f"{method} needs a {col!r} column")
        return df[col].to_numpy(float)

    if method == "dissociation":
        return fit_dissociation(need("time"), y, curve)
    if method == "association":
        return fit_association(need("time"), y, conc, curve, koff=options.get("koff"))
    if method == "competition-kinetics":
        return fit_competition_kinetics(
            need("time"), y, need("concentration"), curve=curve, tracer_kon=options.get("tracer_kon"),
            tracer_koff=options.get("tracer_koff"), tracer_conc=options.get("tracer_conc"),
        )
    if method == "jump-dilution":
        return fit_jump_dilution(need("time"), y, curve, control_label=ctrl,
                                 post_dilution_conc=options.get("post_dilution_conc"), kapp=options.get("kapp"))
    if method == "washout-recovery":
        return fit_washout_recovery(need("time"), y, curve, control_label=ctrl)
    if method == "ki-shift":
        if "incubation" not in cols:
            raise FitError("ki-shift needs an 'incubation' column or curve labels that are times (e.g. '30 min')")
        return fit_ki_shift(need("concentration"), y, df["incubation"].to_numpy(float), labels=curve,
                            tracer_conc=options.get("tracer_conc"), tracer_kd=options.get("tracer_kd"))
    return fit_insurmountability(need("concentration"), y, curve, control_label=ctrl)
