"""The least-squares engine: parameters, one problem, the solvers, the covariance.

Rate constants are fitted as log10 values; several curves are fitted globally
on concatenated residuals with shared parameters
(:func:`scipy.optimize.least_squares`).  Weighted fits minimise
sum(w_i^2 * (y_i - f_i)^2) with w_i = 1/sigma_i up to a common factor:

* ``"none"``: sigma constant (additive noise);
* ``"proportional"``: sigma proportional to the signal (relative error, e.g.
  pipetting and gain errors on a plate reader);
* ``"poisson"``: sigma proportional to sqrt(signal) (counting noise, e.g.
  radioligand counts).

The signal that sets sigma is the *fitted* curve, not the noisy reading:
weights are refreshed from the prediction and the fit repeated until the
estimates settle (iteratively reweighted least squares, the usual remedy for
the bias of weighting by observed values; common practice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Iterable, Mapping, Sequence

import numpy as np
import numpy.typing as npt
from scipy import optimize

from ...errors import FitError
from .curves import CURVE_FUNCTIONS, CurveInfo

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]
BoolArray = npt.NDArray[np.bool_]
Params = dict[str, float]

WEIGHTS = ("none", "proportional", "poisson")

# fitting limits, SI (wide: they only keep the optimiser in a physical range)
KOFF_LIMITS = (1e-9, 1e3)  # 1/s
KON_LIMITS = (1e1, 1e10)  # 1/(M*s); 1e10 ~ Smoluchowski diffusion limit (from memory)
IC50_LIMITS = (1e-15, 1.0)  # M
HILL_LIMITS = (0.1, 10.0)

IRLS_ROUNDS = 8  # reweighting rounds at most; they stop once the estimates move < 1e-6 (log10 units)
_BIG = 1e150


def check_weights(weights: str) -> str:
    """The weighting scheme, or a one-line :class:`FitError` naming the choices."""
    if weights not in WEIGHTS:
        raise FitError(f"weights must be one of {', '.join(WEIGHTS)} (got {weights!r})")
    return weights


def weights_from(signal: FloatArray, weights: str) -> FloatArray:
    """Per-point weights w = 1/sigma (normalised to a median of 1) for a signal level.

    Levels below 1e-3 of the largest |signal| are floored there, so a curve
    that passes through zero does not get an infinite weight.
    """
    s = np.abs(np.asarray(signal, dtype=np.float64))
    if weights == "none" or s.size == 0:
        return np.ones(s.shape)
    top = float(np.max(s)) if np.all(np.isfinite(s)) else 0.0
    if not top > 0:
        return np.ones(s.shape)
    s = np.maximum(s, 1e-3 * top)
    sigma = s if weights == "proportional" else np.sqrt(s)
    w = 1.0 / sigma
    return np.asarray(w / float(np.median(w)), dtype=np.float64)


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
    """Data, parameters, weights and curve function of one least-squares problem."""

    def __init__(self, kind: str, params: Sequence[Param], x: npt.ArrayLike, y: npt.ArrayLike,
                 idx: npt.ArrayLike, curves: Sequence[CurveInfo], context: Mapping[str, float] | None = None,
                 weights: str = "none"):
        self.kind = kind
        self.func = CURVE_FUNCTIONS[kind]
        self.params = list(params)
        self.names = [p.name for p in self.params]
        self.log = np.array([p.log for p in self.params], dtype=bool)
        self.free = np.array([i for i, p in enumerate(self.params) if not p.fixed], dtype=np.intp)
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
        self.lo, self.hi = np.array(lo, dtype=np.float64), np.array(hi, dtype=np.float64)
        th_a = np.array(th, dtype=np.float64)
        span = np.where(np.isfinite(self.hi - self.lo), self.hi - self.lo, 1.0)
        self.theta0: FloatArray = np.clip(th_a, self.lo + 1e-9 * span, self.hi - 1e-9 * span)
        self.x: FloatArray = np.asarray(x, dtype=np.float64)
        self.y: FloatArray = np.asarray(y, dtype=np.float64)
        self.idx: IntArray = np.asarray(idx, dtype=np.intp)
        self.curves = tuple(curves)
        self.context: dict[str, float] = dict(context or {})
        self.weights = check_weights(weights)
        self.w: FloatArray = np.ones(self.y.shape)

    def natural(self, theta: FloatArray) -> Params:
        v = np.where(self.log, 10.0 ** np.where(self.log, theta, 0.0), theta)
        return dict(zip(self.names, map(float, v)))

    def predict(self, theta: FloatArray, x: FloatArray | None = None, idx: IntArray | None = None) -> FloatArray:
        return self.func(self.natural(theta), self.x if x is None else x, self.idx if idx is None else idx,
                         self.curves, self.context)

    def residuals(self, theta: FloatArray) -> FloatArray:
        """Weighted residuals w*(f - y)."""
        return (self.predict(theta) - self.y) * self.w

    def ssr(self, theta: FloatArray) -> float:
        r = self.residuals(theta)
        return float(r @ r) if np.all(np.isfinite(r)) else np.inf

    def reweight(self, theta: FloatArray) -> None:
        """Weights from the fitted signal at ``theta`` (no change for ``'none'``)."""
        if self.weights != "none":
            pred = self.predict(theta)
            if np.all(np.isfinite(pred)):
                self.w = weights_from(pred, self.weights)


@dataclass
class _Fit:
    prob: _Problem
    theta: FloatArray
    ssr: float
    jac: FloatArray
    success: bool
    message: str
    active: BoolArray
    cov: FloatArray | None = None
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
        return self.ssr / self.dof if self.dof > 0 else math.nan

    def value(self, name: str) -> float:
        return self.prob.natural(self.theta)[name]

    def cov_of(self, name: str) -> float:
        """Variance of a free parameter in fitted coordinates (nan when unknown)."""
        j = self.prob.names.index(name)
        free = list(self.prob.free)
        if self.cov is None or j not in free:
            return math.nan
        return float(self.cov[free.index(j), free.index(j)])


def _solve(prob: _Problem, start: FloatArray, free: IntArray, max_nfev: int | None = None, tol: float = 1e-10,
           diff_step: float | None = None) -> tuple[FloatArray, optimize.OptimizeResult]:
    """least_squares over the parameters ``free`` (internal coordinates); returns (theta, res)."""
    base = np.array(start, dtype=np.float64)

    def fun(z: FloatArray) -> FloatArray:
        th = base.copy()
        th[free] = z
        r = prob.residuals(th)
        if not np.all(np.isfinite(r)):
            r = np.nan_to_num(r, nan=_BIG, posinf=_BIG, neginf=-_BIG)
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


def _run(prob: _Problem, starts: Iterable[FloatArray] | None = None, max_nfev: int | None = None,
         tol: float = 1e-10, diff_step: float | None = None) -> _Fit:
    """Fit from each start (internal coordinates), keep the lowest sum of squares; reweight when weighted."""
    best: tuple[FloatArray, optimize.OptimizeResult, float] | None = None
    for st in starts if starts is not None else [prob.theta0]:
        st = np.clip(np.asarray(st, dtype=np.float64), prob.lo, prob.hi)
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
    for _ in range(IRLS_ROUNDS if prob.weights != "none" else 0):
        prob.reweight(th)
        th_new, res = _solve(prob, th, prob.free, max_nfev, tol, diff_step)
        moved = float(np.max(np.abs(th_new - th))) if th.size else 0.0
        th = th_new
        if moved < 1e-6:
            break
    ssr = 2.0 * float(res.cost)
    fit = _Fit(
        prob, th, ssr, np.asarray(res.jac, dtype=np.float64), bool(res.status > 0), str(res.message),
        np.asarray(res.active_mask != 0, dtype=bool),
    )
    fit.active |= _near_bound(prob, th)[prob.free]
    _covariance(fit)
    return fit


def _run_vp(prob: _Problem, nonlinear: Sequence[str], design: Callable[[Params], FloatArray],
            assemble: Callable[[FloatArray], Params], starts: Iterable[Sequence[float]],
            max_nfev: int | None = None, diff_step: float | None = None) -> _Fit:
    """Variable projection: iterate only the ``nonlinear`` parameters, solving the
    linear ones exactly at every step (Golub & Pereyra 1973, SIAM J Numer Anal
    10:413; from memory).  Robust when the linear parameters run away, e.g. a
    decay that looks like a straight line.  ``design(p)`` gives the columns
    whose coefficients ``assemble`` turns into the linear parameters' values.
    The Jacobian at the optimum (all parameters) then gives the covariance.
    ``diff_step`` (relative finite-difference step) matters for models evaluated
    numerically, e.g. by an ODE solver, whose output is not smooth at the
    default step.  Weighted problems are reweighted from the fitted curve and
    refitted until the estimates settle.
    """
    y = prob.y
    jn = [prob.names.index(n) for n in nonlinear]
    base = prob.natural(prob.theta0)
    lo, hi = prob.lo[jn], prob.hi[jn]

    def nat(z: FloatArray) -> Params:
        p = dict(base)
        for n, j, v in zip(nonlinear, jn, z):
            p[n] = 10.0**v if prob.log[j] else float(v)
        return p

    def resid(z: FloatArray) -> FloatArray:
        w = prob.w
        A = design(nat(z)) * w[:, None]
        if not np.all(np.isfinite(A)):
            return np.full(y.shape, _BIG)
        yw = y * w
        r = A @ _solve_linear(A, yw) - yw
        return r if np.all(np.isfinite(r)) else np.full(y.shape, _BIG)

    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)

    def best_of(zs: Iterable[Sequence[float]]) -> optimize.OptimizeResult | None:
        best: optimize.OptimizeResult | None = None
        for z0 in zs:
            z = np.clip(np.asarray(z0, dtype=np.float64), lo + 1e-9 * span, hi - 1e-9 * span)
            try:
                res = optimize.least_squares(resid, z, bounds=(lo, hi), method="trf", ftol=1e-12, xtol=1e-12,
                                             gtol=1e-12, max_nfev=max_nfev or 100 * (len(jn) + 1),
                                             diff_step=diff_step)
            except ValueError:
                continue
            if best is None or res.cost < best.cost:
                best = res
        return best

    best = best_of(starts)
    if best is None or 2 * best.cost >= 1e299:
        raise FitError(f"the {prob.kind} fit did not converge (the model cannot be evaluated on these data)")

    def full_theta(z: FloatArray) -> FloatArray:
        p = nat(z)
        w = prob.w
        p.update(assemble(_solve_linear(design(p) * w[:, None], y * w)))
        return np.array([math.log10(max(p[n], 1e-300)) if lg else p[n] for n, lg in zip(prob.names, prob.log)],
                        dtype=np.float64)

    for _ in range(IRLS_ROUNDS if prob.weights != "none" else 0):
        prob.reweight(full_theta(best.x))
        again = best_of([best.x])
        if again is None:
            break
        moved = float(np.max(np.abs(again.x - best.x))) if best.x.size else 0.0
        best = again
        if moved < 1e-6:
            break
    return _fit_at(prob, full_theta(best.x), bool(best.status > 0), str(best.message), diff_step)


def _fit_at(prob: _Problem, theta: FloatArray, success: bool, message: str, diff_step: float | None = None) -> _Fit:
    """A _Fit at a known optimum: forward-difference Jacobian (stepping inwards at a bound), covariance."""
    theta = np.clip(np.asarray(theta, dtype=np.float64), prob.lo, prob.hi)
    r0 = prob.residuals(theta)
    if not np.all(np.isfinite(r0)):
        raise FitError(f"the {prob.kind} fit did not converge (the model cannot be evaluated at the optimum)")
    rel = diff_step if diff_step is not None else float(np.sqrt(np.finfo(float).eps))
    J = np.empty((r0.size, prob.free.size))
    for k, j in enumerate(prob.free):
        h = rel * max(1.0, abs(float(theta[j])))
        if theta[j] + h > prob.hi[j]:
            h = -h
        th = theta.copy()
        th[j] += h
        J[:, k] = (prob.residuals(th) - r0) / (th[j] - theta[j])
    fit = _Fit(prob, theta, float(r0 @ r0), J, success, message, _near_bound(prob, theta)[prob.free])
    _covariance(fit)
    return fit


def _near_bound(prob: _Problem, theta: FloatArray) -> BoolArray:
    span = np.where(np.isfinite(prob.hi - prob.lo), prob.hi - prob.lo, np.inf)
    tol = np.where(np.isfinite(span), 1e-6 * span, 0.0)
    return np.asarray((np.abs(theta - prob.lo) <= tol) | (np.abs(prob.hi - theta) <= tol), dtype=bool)


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
    fit.cov_ok = bool(np.all(keep)) and bool(s[-1] > s[0] * 1e-10) and bool(np.all(np.isfinite(fit.cov)))


# ============================================================== linear parts
def _solve_linear(A: FloatArray, y: FloatArray) -> FloatArray:
    """Least-squares coefficients: scaled normal equations when well conditioned, else SVD."""
    if A.shape[1] == 2:  # the common case (shape + offset): explicit 2x2 solve
        a0, a1 = A[:, 0], A[:, 1]
        g00, g01, g11 = float(a0 @ a0), float(a0 @ a1), float(a1 @ a1)
        if g00 > 0 and g11 > 0 and np.isfinite(g00 + g11) and 1.0 - g01 * g01 / (g00 * g11) > 1e-9:
            b0, b1 = float(a0 @ y), float(a1 @ y)
            det = g00 * g11 - g01 * g01
            return np.array([(g11 * b0 - g01 * b1) / det, (g00 * b1 - g01 * b0) / det])
        return np.asarray(np.linalg.lstsq(A, y, rcond=None)[0], dtype=np.float64)
    G = A.T @ A
    d = np.sqrt(np.diag(G))
    if np.all(d > 0) and np.all(np.isfinite(d)):
        Gs = G / np.outer(d, d)
        w = np.linalg.eigvalsh(Gs)
        if w[0] > 1e-9 * w[-1]:
            return np.asarray(np.linalg.solve(Gs, (A.T @ y) / d) / d, dtype=np.float64)
    return np.asarray(np.linalg.lstsq(A, y, rcond=None)[0], dtype=np.float64)


def _lin(A: FloatArray, y: FloatArray, w: FloatArray | None = None) -> tuple[FloatArray, float]:
    """Linear least squares (optionally weighted): coefficients and the (weighted) sum of squares."""
    if w is not None:
        A, y = A * w[:, None], y * w
    coef = _solve_linear(A, y)
    r = A @ coef - y
    return coef, float(r @ r)
