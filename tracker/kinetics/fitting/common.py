"""Shared helpers of the fit functions: input checks, curve grouping, starting grids, summaries."""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np
import numpy.typing as npt

from ...errors import FitError
from ...fmt import conc as fmt_conc
from ...fmt import rate2
from ..equations import LN2
from .curves import CurveInfo
from .engine import KOFF_LIMITS, FloatArray, IntArray, _Fit
from .intervals import _recip_ci
from .results import _Builder

RT_LOWER_BOUND_FRACTION = 0.2  # < 20% of the signal dissociated: RT is a lower bound (brief)
TREND_P = 0.01  # a curve "rises" or "falls" when Spearman's rank correlation with time (or dose) has p < 0.01
REPLICATE_SEP = " · "  # curve label of a replicate: "<curve> · <replicate>" (as tracker.io.timecourse writes it)


def _base_label(name: str) -> str:
    """The curve part of a replicate label ("control · r2" -> "control"), lower case."""
    return name.split(REPLICATE_SEP)[0].strip().lower()


def replicate_labels(curve: npt.ArrayLike | None, replicate: npt.ArrayLike | None, n: int) -> npt.NDArray[np.str_] | None:
    """Per-point curve labels that keep replicates apart: ``"<curve> · <replicate>"``.

    Replicate curves of one condition are then fitted jointly: they share the
    method's rate constants and keep their own per-curve amplitudes.
    """
    if replicate is None:
        return None if curve is None else np.asarray([str(v) for v in np.broadcast_to(np.asarray(curve, object), (n,))])
    rep = [str(v) for v in np.broadcast_to(np.asarray(replicate, object), (n,))]
    if curve is None:
        return np.asarray(rep)
    cur = [str(v) for v in np.broadcast_to(np.asarray(curve, object), (n,))]
    return np.asarray([f"{c}{REPLICATE_SEP}{r}" for c, r in zip(cur, rep)])


def _trends(x: FloatArray, y: FloatArray, idx: IntArray, ncurves: int, p_max: float = TREND_P) -> list[int]:
    """Per curve: +1 when the signal rises with ``x``, -1 when it falls, 0 when neither is clear.

    Spearman's rank correlation (scipy.stats.spearmanr) with a two-sided
    p-value below ``p_max``; a rank test needs no model, so the method's own
    fit cannot talk itself into the wrong direction.
    """
    from scipy import stats

    out = []
    for i in range(ncurves):
        sel = idx == i
        xs, ys = x[sel], y[sel]
        if xs.size < 4 or np.ptp(xs) == 0 or np.ptp(ys) == 0:
            out.append(0)
            continue
        res = stats.spearmanr(xs, ys)
        rho, p = float(res.statistic), float(res.pvalue)
        if np.isfinite(p) and p < p_max:
            out.append(1 if rho > 0 else -1)
            continue
        # a curve complete by its second reading: a step from the first reading, far beyond the
        # point-to-point noise (robust sd from the median absolute successive difference)
        order = np.argsort(xs, kind="stable")
        ys_sorted = ys[order]
        first = xs[order] == xs[order][0]
        rest = ys_sorted[~first]
        sd = 1.4826 * float(np.median(np.abs(np.diff(rest)))) / math.sqrt(2.0) if rest.size > 2 else math.inf
        step = float(np.median(rest)) - float(np.mean(ys_sorted[first])) if rest.size else 0.0
        out.append(int(np.sign(step)) if step != 0 and abs(step) > 6.0 * sd else 0)
    return out


def _direction(x: FloatArray, y: FloatArray, idx: IntArray, ncurves: int) -> int:
    """+1 when curves rise and none falls, -1 when they fall and none rises, else 0."""
    tr = _trends(x, y, idx, ncurves)
    up, down = tr.count(1), tr.count(-1)
    if up and not down:
        return 1
    if down and not up:
        return -1
    return 0

def _arrays(x_in: npt.ArrayLike, y_in: npt.ArrayLike, what: str = "time") -> tuple[FloatArray, FloatArray]:
    x = np.asarray(x_in, dtype=np.float64).ravel()
    y = np.asarray(y_in, dtype=np.float64).ravel()
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
        return fmt_conc(v, digits=4)
    return f"{v:.4g} {unit}"


def _group(n: int, labels: npt.ArrayLike | None = None, conc: npt.ArrayLike | None = None,
           control_label: str | None = None, sort_by_conc: bool = True) -> tuple[tuple[CurveInfo, ...], IntArray]:
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
    curves = [CurveInfo(name, float(cvals[i]), "control" if ctl is not None and _base_label(name) == ctl else "sample")
              for i, name in enumerate(names)]
    if labels is not None and conc_arr is not None and sort_by_conc:
        order_i = sorted(range(nc), key=lambda i: (curves[i].role != "control", curves[i].conc))
        remap = np.empty(nc, int)
        remap[order_i] = np.arange(nc)
        curves = [curves[i] for i in order_i]
        idx = remap[idx]
    return tuple(curves), np.asarray(idx, int)


def _min_points(n: int, k: int, method: str, idx: IntArray | None = None, per_curve: int = 3) -> None:
    if n < k + 2:
        raise FitError(f"too few points for {method}: {n} points for {k} parameters (need at least {k + 2})")
    if idx is not None:
        counts = np.bincount(idx)
        if np.any(counts < per_curve):
            raise FitError(f"too few points for {method}: a curve has {int(counts.min())} points (need at least {per_curve})")


def _not_constant(y: FloatArray, method: str) -> None:
    if np.ptp(y) <= 1e-12 * max(1.0, float(np.max(np.abs(y)))):
        raise FitError(f"the signal is constant: nothing to fit for {method}")


def _rate_grid(t: FloatArray, n: int = 40, lims: tuple[float, float] = KOFF_LIMITS) -> FloatArray:
    tp = np.unique(t[t > 0])
    if tp.size == 0:
        raise FitError("all times are zero")
    tmax = tp.max()
    dt = tp.min() if tp.size == 1 else min(tp.min(), float(np.min(np.diff(tp))))
    lo = max(0.05 / tmax, lims[0] * 10)
    hi = min(10.0 / dt, lims[1] / 10)
    if hi <= lo:
        hi = lo * 100
    return np.geomspace(lo, hi, n, dtype=np.float64)


def _ind(idx: IntArray, i: int) -> FloatArray:
    return np.asarray(idx == i, dtype=np.float64)


def _check_strict(fits: Sequence[_Fit], strict: bool, b: _Builder) -> None:
    for f in fits:
        if not f.success:
            msg = f"the {b.method} fit did not converge ({f.message.rstrip('.')})"
            if strict:
                raise FitError(msg)
            b.warn("not-converged", msg)


def _kon_check(b: _Builder, kon: float) -> None:
    if kon > 1e9:
        b.warn("kon-above-practical", f"kon {rate2(kon)} is above ~1e9 /M/s, near the diffusion limit "
               "(practical ceilings 1e8-1e9 /M/s, from memory); check units and concentrations")


def _rate_summary(b: _Builder, koff: float, ci: tuple[float, float], kind: str) -> None:
    b.put("koff", koff, ci, kind)
    b.put("residence_time", 1.0 / koff, _recip_ci(ci), kind)
    b.put("half_life", LN2 / koff, _recip_ci(ci, LN2), kind)


def _rt_lower_bound(b: _Builder, koff_ci: tuple[float, float], why: str) -> None:
    bound = _recip_ci(koff_ci)[0]
    b.estimates["residence_time_lower_bound"] = float(bound)
    b.extras["rt_is_lower_bound"] = True
    b.warn("rt-lower-bound", f"{why}; report the residence time as at least {bound:.3g} s "
           "(1/upper 95% limit of koff), not as a value")


