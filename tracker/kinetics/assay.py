"""Apparent affinity after a finite incubation, and what it tells about kinetics.

Affinity is an equilibrium property.  An assay read before equilibrium reports
an *apparent* affinity; for a slowly dissociating compound the apparent value
is too weak, and a whole series bunches at an "assay floor".  This module
computes, vectorised across compounds (SI floats: M, s, 1/s, 1/(M*s)):

``apparent_affinity(kd, koff, incubation, *, format="saturation", tracer_kd=None, tracer_koff=None, tracer_conc=None, preincubation=0.0)``
    -> :class:`ApparentAffinity` (unpacks as ``apparent, fold``; also ``.ic50``).
    The tracer's koff may be given as ``tracer_residence_time`` instead, or
    one of its KD/koff through ``tracer_kon``.

    * ``format="saturation"``: labelled compound added at t = 0, no depletion;
      occupancy(L, t) = L/(L+KD) (1 - exp(-(kon L + koff) t)).  The apparent KD
      is the concentration giving occupancy 0.5 (half of full occupancy) at t.
      With x = L/KD and tau = koff t the condition is
      x/(1+x) (1 - exp(-tau (1+x))) = 1/2, so the fold shift depends on
      koff*t only; solved by a vectorised bracketed root finder in log x to
      ~1e-13 relative.
    * ``format="competition"``: tracer (``tracer_kd``, ``tracer_koff``,
      ``tracer_conc``) and unlabelled compound added together (Motulsky &
      Mahan 1984, Mol Pharmacol 25:1-9).  IC50(t) is the competitor
      concentration that halves tracer binding at t relative to no competitor
      at the same t; the apparent Ki is IC50/(1 + L/Kd_tracer) (Cheng &
      Prusoff 1973, Biochem Pharmacol 22:3099-3108) with the tracer's TRUE Kd.
      ``preincubation > 0``: compound and receptor are pre-incubated for that
      time, then tracer is added and read ``incubation`` later (exact solution
      of the linear two-state ODE from RI(0) != 0,
      :func:`~tracker.kinetics.equations.competitive_binding`).
    * ``fold`` = apparent / true (KD or Ki).  Below 1 means "looks more
      potent" (possible in competition formats: a competitor faster than the
      tracer, or a slow one pre-incubated and read early).

``min_incubation(kd, koff, tolerance=1.25, *, format=..., tracer...)``
    Shortest incubation after which the apparent value stays within
    ``tolerance``-fold of the true one.  Saturation: closed form
    t = RT ln(2x/(x-1))/(1+x) with x = tolerance.  Competition: log-time scan
    plus bisection on the last excursion outside the band.
``rule_of_thumb_incubation(koff, multiple=2.0)``: incubate >= 2 x RT
    (common practice), shown beside the computed minimum.
``assay_floor(kon, incubation, ...)``: the tightest apparent affinity an
    incubation can report; saturation ln2/(kon t) (koff -> 0).
``near_assay_floor(potency, kon, incubation, *, factor=2.0, ...)``: flags.
``residence_time_bounds(ratio, short_incubation, long_incubation, ki_long, *, kon_range=(1e5, 1e8), ratio_tolerance=1.5)``
    RT interval consistent with a Ki shift between two incubation times.
``find_root(f, lo, hi, ...)``: the vectorised bracketed root finder
    (Chandrupatla 1997, Adv Eng Softw 28:145-149) used throughout.

These are models of ideal assays (one site, no depletion, no rebinding, no
non-specific binding).  They are decision support for reading potency data,
not dosing advice.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from .equations import LN2, association, cheng_prusoff_ki, competitive_binding, motulsky_mahan

__all__ = [
    "ApparentAffinity",
    "ResidenceTimeBounds",
    "FORMATS",
    "apparent_affinity",
    "apparent_kd_saturation",
    "saturation_fold",
    "competition_ic50",
    "min_incubation",
    "rule_of_thumb_incubation",
    "assay_floor",
    "near_assay_floor",
    "residence_time_bounds",
    "find_root",
]

FORMATS = ("saturation", "competition")
_FORMAT_ALIASES = {"saturation": "saturation", "competition": "competition", "competition-binding": "competition"}
_EPS = np.finfo(float).eps

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]
BoolArray = npt.NDArray[np.bool_]
#: f(x, idx) -> values for the problems ``idx`` at points ``x`` (see :func:`find_root`)
RootFn = Callable[[FloatArray, IntArray], FloatArray]


# ----------------------------------------------------------------------------- root finding
def find_root(f: RootFn, lo: npt.ArrayLike, hi: npt.ArrayLike, *, xtol: float = 1e-13, maxiter: int = 200) -> FloatArray:
    """Vectorised bracketed root of ``f`` (Chandrupatla 1997, Adv Eng Softw 28:145-149).

    ``f(x, idx)`` evaluates the function for the problems ``idx`` (an integer
    index array) at points ``x`` (same length).  ``lo``/``hi`` bracket a sign
    change for every problem (not checked beyond a nan result).  Converges to
    ``xtol`` absolute + 4 eps relative; the inverse-quadratic steps fall back to
    bisection, so the worst case is bisection.  Returns the root array.
    """
    a = np.array(lo, dtype=float, copy=True).ravel()
    b = np.array(hi, dtype=float, copy=True).ravel()
    n = a.size
    idx_all = np.arange(n)
    fa = np.asarray(f(a, idx_all), dtype=float)
    fb = np.asarray(f(b, idx_all), dtype=float)
    out = np.full(n, np.nan)
    done0 = fa == 0
    out[done0] = a[done0]
    done1 = (fb == 0) & ~done0
    out[done1] = b[done1]
    bad = (np.sign(fa) == np.sign(fb)) & ~done0 & ~done1
    active = ~(done0 | done1 | bad)
    idx = idx_all[active]
    # state: a = newest point, b = the other end of the bracket, c = previous
    x1, f1 = a[active], fa[active]
    x2, f2 = b[active], fb[active]
    x3, f3 = x2.copy(), f2.copy()
    t = np.full(idx.size, 0.5)
    for _ in range(maxiter):
        if idx.size == 0:
            break
        xt = x1 + t * (x2 - x1)
        ft = np.asarray(f(xt, idx), dtype=float)
        same = np.sign(ft) == np.sign(f1)
        # same sign as x1: x3 <- x1, x1 <- xt ; else x3 <- x2, x2 <- x1, x1 <- xt
        x3 = np.where(same, x1, x2)
        f3 = np.where(same, f1, f2)
        x2 = np.where(same, x2, x1)
        f2 = np.where(same, f2, f1)
        x1, f1 = xt, ft
        use1 = np.abs(f1) < np.abs(f2)
        xm = np.where(use1, x1, x2)
        fm = np.where(use1, f1, f2)
        tol = 4.0 * _EPS * np.abs(xm) + xtol
        width = np.abs(x2 - x1)
        with np.errstate(divide="ignore", invalid="ignore"):
            tlim = tol / width
        conv = (tlim > 0.5) | (fm == 0) | ~np.isfinite(fm)
        if np.any(conv):
            out[idx[conv]] = xm[conv]
            keep = ~conv
            idx, x1, f1, x2, f2, x3, f3, tlim = (v[keep] for v in (idx, x1, f1, x2, f2, x3, f3, tlim))
        if idx.size == 0:
            break
        with np.errstate(divide="ignore", invalid="ignore"):
            xi = (x1 - x2) / (x3 - x2)
            phi = (f1 - f2) / (f3 - f2)
            iqi = (phi**2 < xi) & ((1.0 - phi) ** 2 < 1.0 - xi)
            t_new = f1 / (f2 - f1) * f3 / (f2 - f3) + (x3 - x1) / (x2 - x1) * f1 / (f3 - f1) * f2 / (f3 - f2)
        t = np.where(iqi & np.isfinite(t_new), t_new, 0.5)
        t = np.clip(t, tlim, 1.0 - tlim)
    if idx.size:  # not converged within maxiter: best point so far
        use1 = np.abs(f1) < np.abs(f2)
        out[idx] = np.where(use1, x1, x2)
    return out


def _expand_bracket(g: RootFn, guess: FloatArray, idx_n: int, *, factor: float = 4.0,
                    max_steps: int = 80) -> tuple[FloatArray, FloatArray]:
    """For decreasing-in-x ``g`` (log-x space), find lo/hi with g(lo) > 0 > g(hi)."""
    lo = guess - np.log(factor)
    hi = guess + np.log(factor)
    step = np.log(16.0)
    idx = np.arange(idx_n, dtype=np.intp)
    for _ in range(max_steps):
        glo = g(lo, idx)
        need = glo <= 0
        if not need.any():
            break
        lo = np.where(need, lo - step, lo)
    for _ in range(max_steps):
        ghi = g(hi, idx)
        need = ghi >= 0
        if not need.any():
            break
        hi = np.where(need, hi + step, hi)
    return lo, hi


# ----------------------------------------------------------------------------- helpers
def _arr(x: Any, name: str, *, allow_zero: bool = False) -> FloatArray:
    a = np.asarray(x, dtype=float)
    if a.size and (not np.all(np.isfinite(a)) or np.any(a < 0) or (not allow_zero and np.any(a == 0))):
        raise InputError(f"{name} must be {'non-negative' if allow_zero else 'positive'} and finite")
    return a


def _format(fmt: str) -> str:
    try:
        return _FORMAT_ALIASES[str(fmt).strip().lower()]
    except KeyError:
        raise InputError(f"unknown assay format {fmt!r}: use saturation or competition") from None


def _tracer(tracer_kd: Any, tracer_koff: Any, tracer_conc: Any, tracer_residence_time: Any = None,
            tracer_kon: Any = None) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Tracer (KD, koff, concentration); koff may come as a residence time, or KD/koff via kon."""
    if tracer_koff is None and tracer_residence_time is not None:
        tracer_koff = 1.0 / _arr(tracer_residence_time, "tracer residence time")
    if tracer_kon is not None:
        kon = _arr(tracer_kon, "tracer kon")
        if tracer_koff is None and tracer_kd is not None:
            tracer_koff = kon * _arr(tracer_kd, "tracer KD")
        elif tracer_kd is None and tracer_koff is not None:
            tracer_kd = _arr(tracer_koff, "tracer koff") / kon
    if tracer_kd is None or tracer_koff is None or tracer_conc is None:
        raise InputError("competition format needs the tracer's KD, koff (or residence time) and concentration")
    return _arr(tracer_kd, "tracer KD"), _arr(tracer_koff, "tracer koff"), _arr(tracer_conc, "tracer concentration")


# ----------------------------------------------------------------------------- saturation
def saturation_fold(koff_t: npt.ArrayLike) -> FloatArray:
    """Fold shift x = apparent KD / KD of the saturation format as a function of tau = koff*t.

    Solves x/(1+x) (1 - exp(-tau (1+x))) = 1/2.  Bracket: x >= max(1, ln2/tau - 1)
    (either factor <= 1/2 there) and x <= max(3, ln3/tau) (3/4 * 2/3 >= 1/2).
    Root in log x; relative accuracy ~1e-13.
    """
    tau = np.asarray(koff_t, dtype=float)
    shape = tau.shape
    tau = tau.ravel()
    lo = np.log(np.maximum(1.0, LN2 / tau - 1.0))
    hi = np.log(np.maximum(3.0, np.log(3.0) / tau))

    def g(lx: FloatArray, idx: IntArray) -> FloatArray:
        x = np.exp(lx)
        tt = tau[idx]
        return x / (1.0 + x) * -np.expm1(-tt * (1.0 + x)) - 0.5

    # at tau -> inf the lower end is a root itself (g = 0); find_root returns it
    return np.exp(find_root(g, lo, hi)).reshape(shape)


def apparent_kd_saturation(kd: npt.ArrayLike, koff: npt.ArrayLike, incubation: npt.ArrayLike) -> FloatArray:
    """Apparent KD of a saturation experiment read at ``incubation`` (see module doc)."""
    kd, koff, t = np.broadcast_arrays(_arr(kd, "KD"), _arr(koff, "koff"), _arr(incubation, "incubation time"))
    return kd * saturation_fold(koff * t)


# ----------------------------------------------------------------------------- competition
def _competition_ratio(log_i: FloatArray, t: FloatArray, L: FloatArray, k1: FloatArray, k2: FloatArray,
                       k3: FloatArray, k4: FloatArray, tpre: FloatArray) -> FloatArray:
    """Tracer binding with competitor / without, at time t after tracer addition."""
    conc = np.exp(log_i)
    ref = association(t, L, k1, k2)
    if np.any(tpre > 0):
        # pre-incubation of competitor with receptor, no tracer: one-ligand association
        with np.errstate(divide="ignore", invalid="ignore"):
            ri0 = np.where(tpre > 0, conc * k3 / (conc * k3 + k4) * -np.expm1(-(k3 * conc + k4) * tpre), 0.0)
        rl, _ = competitive_binding(t, L, k1, k2, conc, k3, k4, 0.0, ri0)
        plain = motulsky_mahan(t, L, k1, k2, conc, k3, k4)
        b = np.where(tpre > 0, rl, plain)
    else:
        b = motulsky_mahan(t, L, k1, k2, conc, k3, k4)
    return b / ref


def competition_ic50(kon: npt.ArrayLike, koff: npt.ArrayLike, incubation: npt.ArrayLike, tracer_kd: npt.ArrayLike,
                     tracer_koff: npt.ArrayLike, tracer_conc: npt.ArrayLike,
                     preincubation: npt.ArrayLike = 0.0) -> FloatArray:
    """IC50 at ``incubation`` for a competitor (kon, koff) against a tracer (Motulsky & Mahan 1984).

    ``koff = 0`` (irreversible) is allowed.  Everything broadcasts; returns M.
    """
    arrs = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (kon, koff, incubation, tracer_kd, tracer_koff, tracer_conc, preincubation))
    )
    k3, k4, t, kd_t, k2, L, tpre = (a.ravel() for a in arrs)
    shape = arrs[0].shape
    k1 = k2 / kd_t
    # starting guess: the larger of the equilibrium IC50 and the finite-time floor
    with np.errstate(divide="ignore"):
        ki = k4 / k3
        eq = ki * (1.0 + L / kd_t)
        floor = LN2 / (k3 * (t + tpre)) * (1.0 + L / kd_t)
    guess = np.log(np.maximum(eq, floor))

    def g(lx: FloatArray, idx: IntArray) -> FloatArray:
        return _competition_ratio(lx, t[idx], L[idx], k1[idx], k2[idx], k3[idx], k4[idx], tpre[idx]) - 0.5

    lo, hi = _expand_bracket(g, guess, t.size)
    return np.exp(find_root(g, lo, hi)).reshape(shape)


# ----------------------------------------------------------------------------- public API
@dataclass(frozen=True, eq=False)
class ApparentAffinity:
    """Result of :func:`apparent_affinity`.  Unpacks as ``apparent, fold``.

    ``apparent``: apparent KD (saturation) or apparent Ki (competition), M.
    ``fold``: apparent / true.  ``ic50``: IC50 at the incubation (competition;
    NaN for saturation).  ``format``: the format used.
    """

    apparent: np.ndarray
    fold: np.ndarray
    ic50: np.ndarray
    format: str = "saturation"

    def __iter__(self) -> Iterator[FloatArray]:
        return iter((self.apparent, self.fold))

    def __len__(self) -> int:
        return 2

    def __getitem__(self, i: int) -> FloatArray:
        return (self.apparent, self.fold)[i]


def apparent_affinity(
    kd: npt.ArrayLike,
    koff: npt.ArrayLike,
    incubation: npt.ArrayLike,
    *,
    format: str = "saturation",
    tracer_kd: npt.ArrayLike | None = None,
    tracer_koff: npt.ArrayLike | None = None,
    tracer_conc: npt.ArrayLike | None = None,
    preincubation: npt.ArrayLike = 0.0,
    tracer_residence_time: npt.ArrayLike | None = None,
    tracer_kon: npt.ArrayLike | None = None,
) -> ApparentAffinity:
    """Apparent affinity after ``incubation`` s, vectorised over compounds.

    Parameters (all SI, broadcast together)
    ----------
    kd, koff : true KD (M) and koff (1/s) of the compound; kon = koff/kd.
    incubation : read time (s); for competition, time after tracer addition.
    format : ``"saturation"`` or ``"competition"`` (alias ``"competition-binding"``).
    tracer_kd, tracer_koff, tracer_conc : the tracer (competition only);
        ``tracer_residence_time`` or ``tracer_kon`` may stand in for one of
        KD/koff.
    preincubation : competitor-with-receptor pre-incubation (s) before tracer
        addition (competition only); 0 = added together.

    Returns
    -------
    ApparentAffinity, unpacking as ``(apparent, fold)``.

    Examples
    --------
    >>> a, f = apparent_affinity(1e-9, 1 / 21600, 3600)   # RT 6 h, KD 1 nM, 1 h
    >>> round(float(f), 2)
    4.62
    """
    fmt = _format(format)
    kd = _arr(kd, "KD")
    koff = _arr(koff, "koff")
    t = _arr(incubation, "incubation time")
    if fmt == "saturation":
        if np.any(np.asarray(preincubation) != 0):
            raise InputError("pre-incubation applies to the competition format only")
        app = apparent_kd_saturation(kd, koff, t)
        fold = app / kd
        return ApparentAffinity(app, fold, np.full(np.shape(app), np.nan), fmt)
    kd_t, koff_t, L = _tracer(tracer_kd, tracer_koff, tracer_conc, tracer_residence_time, tracer_kon)
    tpre = _arr(preincubation, "pre-incubation time", allow_zero=True)
    kon = koff / kd
    ic50 = competition_ic50(kon, koff, t, kd_t, koff_t, L, tpre)
    ki_app = cheng_prusoff_ki(ic50, L, kd_t)
    fold = ki_app / kd
    return ApparentAffinity(ki_app, fold, ic50, fmt)


def rule_of_thumb_incubation(koff: npt.ArrayLike, multiple: float = 2.0) -> FloatArray:
    """Rule of thumb: incubate at least ``multiple`` x RT (common practice: 2 x RT)."""
    return multiple / _arr(koff, "koff")


def min_incubation(
    kd: npt.ArrayLike,
    koff: npt.ArrayLike,
    tolerance: npt.ArrayLike = 1.25,
    *,
    format: str = "saturation",
    tracer_kd: npt.ArrayLike | None = None,
    tracer_koff: npt.ArrayLike | None = None,
    tracer_conc: npt.ArrayLike | None = None,
    preincubation: npt.ArrayLike = 0.0,
    tracer_residence_time: npt.ArrayLike | None = None,
    tracer_kon: npt.ArrayLike | None = None,
    n_scan: int = 96,
) -> FloatArray:
    """Shortest incubation (s) after which the apparent value stays within ``tolerance``-fold.

    Saturation: fold(t) falls monotonically to 1, and fold = x at
    koff t = ln(2x/(x-1))/(1+x) (closed form, exact).  Competition: fold(t)
    need not be monotone (a fast competitor reads too potent early), so fold
    is scanned on ``n_scan`` log-spaced times up to 60 slowest relaxation
    times, and the end of the last excursion outside [1/tolerance, tolerance]
    is refined by a bracketed root search on the band edge it crosses
    (:func:`find_root`, relative 1e-12).  The reading is "within tolerance"
    from the returned time on.
    """
    if not np.all(np.asarray(tolerance, dtype=float) > 1.0):
        raise InputError("tolerance must be a fold greater than 1, e.g. 1.25")
    fmt = _format(format)
    kd = _arr(kd, "KD")
    koff = _arr(koff, "koff")
    tol = np.asarray(tolerance, dtype=float)
    if fmt == "saturation":
        kd, koff, tol = np.broadcast_arrays(kd, koff, tol)
        return np.asarray(np.log(2.0 * tol / (tol - 1.0)) / (1.0 + tol) / koff, dtype=np.float64)
    kd_t, koff_t, L = _tracer(tracer_kd, tracer_koff, tracer_conc, tracer_residence_time, tracer_kon)
    tpre = _arr(preincubation, "pre-incubation time", allow_zero=True)
    arrs = np.broadcast_arrays(kd, koff, kd_t, koff_t, L, tpre, tol)
    shape = arrs[0].shape
    kd, koff, kd_t, koff_t, L, tpre, tol = (a.ravel().astype(float) for a in arrs)
    kon = koff / kd
    k1 = koff_t / kd_t
    # slowest relaxation near the IC50 (Motulsky & Mahan KS), and the fastest
    i50 = kd * (1.0 + L / kd_t)
    ka_, kb_ = k1 * L + koff_t, kon * i50 + koff
    kf = 0.5 * (ka_ + kb_ + np.sqrt((ka_ - kb_) ** 2 + 4 * k1 * kon * L * i50))
    ks = (k1 * L * koff + koff_t * kon * i50 + koff_t * koff) / kf
    t_hi = 60.0 / np.minimum(ks, koff)
    t_lo = 1e-3 / kf
    grid = np.exp(np.linspace(np.log(t_lo), np.log(t_hi), n_scan).T)  # (n, n_scan)
    n = kd.size

    def fold_at(tt: FloatArray, rows: IntArray) -> FloatArray:
        ic = competition_ic50(kon[rows], koff[rows], tt, kd_t[rows], koff_t[rows], L[rows], tpre[rows])
        return np.asarray(cheng_prusoff_ki(ic, L[rows], kd_t[rows]) / kd[rows], dtype=np.float64)

    rows = np.repeat(np.arange(n), n_scan)
    f = fold_at(grid.ravel(), rows).reshape(n, n_scan)
    out_band = (f > tol[:, None]) | (f < 1.0 / tol[:, None])
    result = np.full(n, np.nan)
    any_out = out_band.any(axis=1)
    result[~any_out] = t_lo[~any_out]
    last = np.where(any_out, n_scan - 1 - np.argmax(out_band[:, ::-1], axis=1), 0)
    still_out = any_out & (last == n_scan - 1)
    sel = np.nonzero(any_out & ~still_out)[0]
    if sel.size:
        lo = np.log(grid[sel, last[sel]])
        hi = np.log(grid[sel, last[sel] + 1])
        # the band edge crossed between the last out-of-band node and the next (in-band) one
        above = f[sel, last[sel]] > tol[sel]
        edge = np.where(above, tol[sel], 1.0 / tol[sel])
        sign = np.where(above, 1.0, -1.0)

        def g(log_t: FloatArray, idx: IntArray) -> FloatArray:  # > 0 outside the band at that edge, <= 0 inside
            return sign[idx] * (fold_at(np.exp(log_t), sel[idx]) - edge[idx])

        x = find_root(g, lo, hi, xtol=1e-12)
        result[sel] = np.exp(np.where(np.isfinite(x), x, hi))  # no sign change (never expected): the in-band node
    return result.reshape(shape)


def assay_floor(
    kon: npt.ArrayLike,
    incubation: npt.ArrayLike,
    *,
    format: str = "saturation",
    tracer_kd: npt.ArrayLike | None = None,
    tracer_koff: npt.ArrayLike | None = None,
    tracer_conc: npt.ArrayLike | None = None,
    preincubation: npt.ArrayLike = 0.0,
) -> FloatArray:
    """Tightest apparent affinity (M) an incubation can report for a compound with this kon.

    Saturation: an infinitely slow dissociator (koff -> 0) gives occupancy
    1 - exp(-kon L t) = 1/2 at L = ln2/(kon t) (exact limit).  Competition:
    the apparent Ki (Cheng-Prusoff) of an irreversible competitor (koff = 0),
    computed with the Motulsky-Mahan solution.
    """
    fmt = _format(format)
    kon = _arr(kon, "kon")
    t = _arr(incubation, "incubation time")
    if fmt == "saturation":
        return LN2 / (kon * t)
    kd_t, koff_t, L = _tracer(tracer_kd, tracer_koff, tracer_conc)
    tpre = _arr(preincubation, "pre-incubation time", allow_zero=True)
    ic50 = competition_ic50(kon, 0.0, t, kd_t, koff_t, L, tpre)
    return cheng_prusoff_ki(ic50, L, kd_t)


def near_assay_floor(potency: npt.ArrayLike, kon: npt.ArrayLike, incubation: npt.ArrayLike, *, factor: float = 2.0,
                     **floor_kw: Any) -> BoolArray:
    """True where a reported potency (M) lies within ``factor``-fold of the assay floor.

    Such a value says little about the true affinity: the compound may be far
    more potent than reported (an underestimated affinity can mean unexpected
    target coverage and mechanism-based toxicity).
    """
    if not factor >= 1.0:
        raise InputError("factor must be >= 1")
    floor = assay_floor(kon, incubation, **floor_kw)
    return np.asarray(_arr(potency, "potency") <= factor * floor, dtype=bool)


# ----------------------------------------------------------------------------- Ki shift -> RT
@dataclass(frozen=True, eq=False)
class ResidenceTimeBounds:
    """RT interval (s) consistent with a Ki shift and a plausible kon range.

    ``rt_low``/``rt_high``: the combined interval (0 / inf when unbounded,
    NaN when the evidence is inconsistent).  ``rt_from_ratio_*``: the interval
    from the shift alone; ``rt_from_kon_*``: from the kon range and the
    long-incubation potency alone.  ``kd_at_rt_low``/``kd_at_rt_high``: the
    KD estimate (the long-incubation potency corrected for its own finite
    incubation) at either end of the interval; ~``ki_long`` when the long read
    was at equilibrium, 0 when RT is unbounded (potency at the floor).  ``consistent``: False where the intervals do not overlap.
    """

    rt_low: np.ndarray
    rt_high: np.ndarray
    rt_from_ratio_low: np.ndarray
    rt_from_ratio_high: np.ndarray
    rt_from_kon_low: np.ndarray
    rt_from_kon_high: np.ndarray
    kd_at_rt_low: np.ndarray
    kd_at_rt_high: np.ndarray
    consistent: np.ndarray
    shift_detected: np.ndarray
    notes: tuple[str, ...] = field(default_factory=tuple)
    #: per element: ``consistent``; ``kon-below-range`` (the shift implies an RT so long that
    #: the long-incubation potency needs a kon below the range: strongly slow binding, not a
    #: contradiction); ``kon-above-range`` (the potency needs a kon above the range, or is
    #: below the floor of the highest kon); ``ratio-beyond-one-step`` (larger than t_long/t_short);
    #: ``ratio-below-one`` (the short read is tighter than the long one beyond the tolerance)
    verdict: np.ndarray | None = None


def _shift_ratio(tau_s: FloatArray, tau_l: FloatArray) -> FloatArray:
    return saturation_fold(tau_s) / saturation_fold(tau_l)


def _rt_for_ratio(target: FloatArray, t_s: FloatArray, t_l: FloatArray) -> FloatArray:
    """RT with x(t_s/RT)/x(t_l/RT) = target, for 1 < target < t_l/t_s (increasing in RT)."""
    target, t_s, t_l = (a.ravel() for a in np.broadcast_arrays(target, t_s, t_l))

    def g(log_rt: FloatArray, idx: IntArray) -> FloatArray:
        rt = np.exp(log_rt)
        return _shift_ratio(t_s[idx] / rt, t_l[idx] / rt) - target[idx]

    # ratio ~ 1 + small for RT << t_s; ~ t_l/t_s for RT >> t_l
    lo = np.log(t_s) - 8.0
    hi = np.log(t_l) + 8.0
    idx = np.arange(target.size)
    for _ in range(60):
        bad = g(lo, idx) > 0
        if not bad.any():
            break
        lo = np.where(bad, lo - 4.0, lo)
    for _ in range(60):
        bad = g(hi, idx) < 0
        if not bad.any():
            break
        hi = np.where(bad, hi + 4.0, hi)
    return np.exp(find_root(g, lo, hi, xtol=1e-12))


def _rt_for_kon(kon: FloatArray, t_l: FloatArray, ki_long: FloatArray) -> FloatArray:
    """RT at which a compound of this kon reads ``ki_long`` after t_l (saturation-equivalent).

    kon(RT) = x(t_l/RT)/(RT ki_long) falls monotonically from inf (RT -> 0) to
    ln2/(t_l ki_long) (RT -> inf, the assay floor).  Returns inf below that.
    """
    kon, t_l, ki = (a.ravel() for a in np.broadcast_arrays(kon, t_l, ki_long))
    floor_kon = LN2 / (t_l * ki)
    out = np.full(kon.size, np.inf)
    ok = kon > floor_kon * (1.0 + 1e-12)
    if ok.any():
        kk, tl, kii = kon[ok], t_l[ok], ki[ok]

        def g(log_rt: FloatArray, idx: IntArray) -> FloatArray:
            rt = np.exp(log_rt)
            return np.asarray(saturation_fold(tl[idx] / rt) / (rt * kii[idx]) - kk[idx], dtype=np.float64)

        # RT = 1/(kon ki) reads at equilibrium (x=1 needs RT->0); x >= 1 so kon(RT) >= 1/(RT ki)
        lo = np.log(1.0 / (kk * kii)) - 1e-9
        hi = lo + 2.0
        idx = np.arange(kk.size)
        for _ in range(200):
            bad = g(hi, idx) > 0
            if not bad.any():
                break
            hi = np.where(bad, hi + 2.0, hi)
        out[ok] = np.exp(find_root(g, lo, hi, xtol=1e-12))
    return out


def residence_time_bounds(
    ratio: npt.ArrayLike,
    short_incubation: npt.ArrayLike,
    long_incubation: npt.ArrayLike,
    ki_long: npt.ArrayLike,
    *,
    kon_range: tuple[float, float] = (1e5, 1e8),
    ratio_tolerance: float = 1.5,
) -> ResidenceTimeBounds:
    """Interval of residence time consistent with a Ki shift between two incubations.

    Model: the fast-tracer competition assay, whose Cheng-Prusoff Ki after t
    equals the saturation apparent KD (tracer equilibration much faster than
    the compound's; then KD_app/KD = x(koff t), see :func:`saturation_fold`).
    The shift ratio = Ki(short)/Ki(long) = x(t_s/RT)/x(t_l/RT) rises
    monotonically with RT from 1 to t_l/t_s.

    * From the ratio, measured within ``ratio_tolerance``-fold (a design
      default; set it to your assay's replicate variability), RT lies between
      the RTs giving ratio/tol and ratio*tol.  No shift (the band reaches 1)
      gives an upper bound only; a band reaching t_l/t_s gives a lower bound
      only (the long read may itself be at the floor).
    * From the kon range (typical small-molecule kon ~1e5-1e8 /M/s, from
      memory) and the long-incubation potency ``ki_long`` taken as the KD
      estimate, corrected for its own incubation: kon = x(t_l/RT)/(RT ki_long).
      kon_high gives the lower RT bound; kon_low the upper one, which is
      unbounded when ki_long sits at the assay floor for kon_low.
    The result is the intersection.  Vectorised over all arguments.
    """
    r = np.asarray(ratio, dtype=float)
    t_s = _arr(short_incubation, "short incubation")
    t_l = _arr(long_incubation, "long incubation")
    ki = _arr(ki_long, "Ki at the long incubation")
    if not np.all(np.isfinite(r)) or np.any(r <= 0):
        raise InputError("Ki-shift ratio must be positive and finite")
    if np.any(t_l <= t_s):
        raise InputError("the long incubation must be longer than the short one")
    tol = float(ratio_tolerance)
    if not tol >= 1.0:
        raise InputError("ratio tolerance must be a fold >= 1")
    kon_lo, kon_hi = (float(k) for k in kon_range)
    if not (0 < kon_lo <= kon_hi):
        raise InputError("kon range must be two positive values, low then high")
    r, t_s, t_l, ki = np.broadcast_arrays(r, t_s, t_l, ki)
    shape = r.shape
    r, t_s, t_l, ki = (a.ravel().astype(float) for a in (r, t_s, t_l, ki))
    max_ratio = t_l / t_s
    band_lo = r / tol
    band_hi = r * tol
    # ratio-only interval
    lo_rt = np.zeros(r.size)
    hi_rt = np.full(r.size, np.inf)
    m = (band_lo > 1.0) & (band_lo < max_ratio)
    if m.any():
        lo_rt[m] = _rt_for_ratio(band_lo[m], t_s[m], t_l[m])
    m = band_hi < max_ratio
    m_ok = m & (band_hi > 1.0)
    if m_ok.any():
        hi_rt[m_ok] = _rt_for_ratio(band_hi[m_ok], t_s[m_ok], t_l[m_ok])
    ratio_impossible = (band_lo >= max_ratio) | (band_hi <= 1.0)
    shift_detected = band_lo > 1.0
    # kon-only interval
    kon_low_rt = _rt_for_kon(np.full(r.size, kon_hi), t_l, ki)
    kon_high_rt = _rt_for_kon(np.full(r.size, kon_lo), t_l, ki)
    floor_kon = LN2 / (t_l * ki)
    kon_impossible = kon_hi <= floor_kon
    low = np.maximum(lo_rt, kon_low_rt)
    high = np.minimum(hi_rt, kon_high_rt)
    consistent = ~ratio_impossible & ~kon_impossible & (low <= high)
    low = np.where(consistent, low, np.nan)
    high = np.where(consistent, high, np.nan)
    # KD = ki_long / x(t_l/RT): ~ki_long at the low RT, smaller (0 if unbounded) at the high RT
    kd_at_low = np.full(r.size, np.nan)
    kd_at_high = np.full(r.size, np.nan)
    c = np.nonzero(consistent)[0]
    if c.size:
        kd_at_low[c] = ki[c] / saturation_fold(t_l[c] / low[c])
        fin = c[np.isfinite(high[c])]
        kd_at_high[c] = 0.0
        if fin.size:
            kd_at_high[fin] = ki[fin] / saturation_fold(t_l[fin] / high[fin])
    verdict = np.full(r.size, "consistent", dtype=object)
    verdict[~consistent & (lo_rt > kon_high_rt)] = "kon-below-range"
    verdict[~consistent & (kon_impossible | (hi_rt < kon_low_rt))] = "kon-above-range"
    verdict[band_hi <= 1.0] = "ratio-below-one"
    verdict[band_lo >= max_ratio] = "ratio-beyond-one-step"
    notes = []
    if np.any(~consistent & (verdict == "kon-below-range")):
        notes.append("the shift implies a residence time so long that the long-incubation potency needs a kon below the "
                     "assumed range: strongly slow binding (or slow association), not a contradiction")
    if np.any(ratio_impossible):
        notes.append("shift outside what slow binding can explain (ratio must lie between 1 and t_long/t_short)")
    if np.any(kon_impossible):
        notes.append("long-incubation potency is below the assay floor for the highest kon: kon must be higher")
    if np.any(consistent & ~np.isfinite(high)):
        notes.append("no upper bound: the long-incubation potency may sit at the assay floor")
    def rs(a: npt.NDArray[Any]) -> npt.NDArray[Any]:
        return a.reshape(shape)

    return ResidenceTimeBounds(
        rs(low), rs(high), rs(lo_rt), rs(hi_rt), rs(kon_low_rt), rs(kon_high_rt), rs(kd_at_low), rs(kd_at_high),
        rs(consistent), rs(shift_detected), tuple(notes), rs(verdict),
    )
