"""Dissociation: one-phase decay shared across curves, the lower-bound rule, the two-phase check."""

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
    TREND_P,
    _direction,
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

BIPHASIC_P = 1e-3  # extra-sum-of-squares F test
BIPHASIC_DAICC = 6.0  # and AICc clearly lower (Burnham & Anderson: >~6 strong support; from memory)

# ============================================================== dissociation
def fit_dissociation(
    t: npt.ArrayLike, signal: npt.ArrayLike, curve: npt.ArrayLike | None = None, *, check_biphasic: bool = True, intervals: str = "auto",
    lower_bound_fraction: float = RT_LOWER_BOUND_FRACTION, max_nfev: int | None = None, strict: bool = True,
    weights: str = "none",
) -> FitResult:
    """One-phase dissociation to a plateau: Y = plateau + span*exp(-koff*t).

    Several curves (``curve`` labels, e.g. replicates) are fitted jointly:
    they share koff and keep their own span and plateau.  Reports ``koff``
    (1/s), ``residence_time`` = 1/koff (s; Copeland, Pompliano & Meek 2006, Nat
    Rev Drug Discov 5:730) and ``half_life`` = ln2/koff (s).

    Parameters
    ----------
    t : array_like
        Time since the start of dissociation, s.
    signal : array_like
        Bound signal (any unit).
    curve : array_like, optional
        Curve label per point.
    weights : {"none", "proportional", "poisson"}
        Noise model: constant, proportional to the signal, or proportional to
        its square root (see :mod:`tracker.kinetics.fitting.engine`).

    Raises
    ------
    FitError
        When a curve rises with time (an association or washout-recovery
        trace, not a dissociation), or the data cannot be fitted.

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
    check_weights(weights)
    t, y = _arrays(t, signal)
    curves, idx = _group(t.size, curve)
    nc = len(curves)
    _min_points(t.size, 1 + 2 * nc, method, idx, per_curve=4)
    _not_constant(y, method)
    rising = [c.label for c, d in zip(curves, _trends(t, y, idx, nc)) if d > 0]
    if rising:
        which = "the signal" if nc == 1 else f"curve {rising[0]!r}"
        raise FitError(f"dissociation: {which} rises with time (Spearman test p < {TREND_P:g}), so this is not a "
                       "dissociation; likely method: association (binding onset) or washout-recovery (response "
                       "returning after washout)")

    def design(k: float, plateau: bool = True) -> FloatArray:
        cols: list[FloatArray] = []
        for i in range(nc):
            m = _ind(idx, i)
            cols.append(m * np.exp(-k * t))
            if plateau:
                cols.append(m)
        return np.column_stack(cols)

    def make(koff0: float, pairs: FloatArray | Sequence[float], plateau_free: bool = True) -> _Problem:
        """pairs: flat [span, plateau] per curve."""
        ps = [Param("koff", koff0, log=True, lower=KOFF_LIMITS[0], upper=KOFF_LIMITS[1], key=True)]
        for i, c in enumerate(curves):
            ps.append(Param(f"span[{c.label}]", pairs[2 * i]))
            ps.append(Param(f"plateau[{c.label}]", pairs[2 * i + 1] if plateau_free else 0.0, fixed=not plateau_free))
        return _Problem("one-phase-decay", ps, t, y, idx, curves, weights=weights)

    grid = _rate_grid(t)
    scored = sorted(((_lin(design(k), y)[1], k) for k in grid))
    starts_k = [k for _, k in scored[:3]]
    prob = make(starts_k[0], _lin(design(starts_k[0]), y)[0])

    def pairs(c: FloatArray, plateau: bool = True) -> Params:
        out: Params = {}
        for i, cv in enumerate(curves):
            out[f"span[{cv.label}]"] = float(c[2 * i] if plateau else c[i])
            if plateau:
                out[f"plateau[{cv.label}]"] = float(c[2 * i + 1])
        return out

    fit = _run_vp(prob, ["koff"], lambda p: design(p["koff"]), pairs, [[math.log10(k)] for k in starts_k], max_nfev)

    b = _Builder(method, weights)
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
    elif np.isfinite(observed) and 0.0 <= observed < lower_bound_fraction:
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


def _biphasic_check(b: _Builder, fit1: _Fit, t: FloatArray, y: FloatArray, idx: IntArray,
                    curves: Sequence[CurveInfo], max_nfev: int | None) -> None:
    nc = len(curves)
    grid = _rate_grid(t, 18)

    def design(k1: float, k2: float) -> FloatArray:
        cols: list[FloatArray] = []
        for i in range(nc):
            m = _ind(idx, i)
            cols += [m * np.exp(-k1 * t), m * np.exp(-k2 * t), m]
        return np.column_stack(cols)

    w = fit1.prob.w  # the one-phase fit's weights (equal to 1 unless weighted)
    best: tuple[float, float, float] | None = None
    for a in range(grid.size):
        for c in range(a + 2, grid.size):
            _, ssr = _lin(design(float(grid[c]), float(grid[a])), y, w)
            if best is None or ssr < best[0]:
                best = (ssr, float(grid[c]), float(grid[a]))
    if best is None:
        return
    _, kf, ks = best
    # variable projection: only the two rates are iterated, the amplitudes and
    # plateaus are solved exactly at every step (Golub & Pereyra 1973, from memory)
    lo, hi = math.log10(KOFF_LIMITS[0]), math.log10(KOFF_LIMITS[1])

    def resid(z: FloatArray) -> FloatArray:
        A = design(10 ** float(z[0]), 10 ** float(z[1])) * w[:, None]
        c = np.linalg.lstsq(A, y * w, rcond=None)[0]
        return np.asarray(A @ c - y * w, dtype=np.float64)

    k1 = fit1.value("koff")
    best2: Any = None
    for pair in ((math.log10(kf), math.log10(ks)), (math.log10(k1 * 3), math.log10(k1 / 3))):
        z0 = np.clip(np.array(pair), lo + 1e-6, hi - 1e-6)
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
    coef2, _ = _lin(design(10 ** float(best2.x[0]), 10 ** float(best2.x[1])), y, w)
    k2 = 2 + 3 * nc
    df1, df2 = fit1.dof, fit1.n - k2
    if df2 <= 0 or ssr2 <= 0 or ssr2 >= fit1.ssr:
        return
    F = ((fit1.ssr - ssr2) / (df1 - df2)) / (ssr2 / df2)
    p = float(stats.f.sf(F, df1 - df2, df2))
    n = fit1.n

    def aicc(ssr: float, k: int) -> float:
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
               f"fast {rate1(fast)}, slow {rate1(slow)} ({100 * frac_slow:.0f}% slow); the one-phase koff averages "
               "two processes (second site, rebinding, induced fit or a mixture) and the slow phase's residence "
               f"time is {1 / slow:.3g} s")


