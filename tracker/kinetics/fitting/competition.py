"""Competition kinetics: competitor kon/koff by Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9)."""

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


# ============================================================== competition kinetics
def _tracer_constants(kon: float | None, koff: float | None, conc: float | None) -> tuple[float, float, float]:
    out = []
    for name, v in (("tracer kon", kon), ("tracer koff", koff), ("tracer concentration", conc)):
        if v is None or not (np.isfinite(v) and v > 0):
            raise FitError(f"competition kinetics needs the {name} (a positive number)")
        out.append(float(v))
    return out[0], out[1], out[2]


def fit_competition_kinetics(
    t: npt.ArrayLike, signal: npt.ArrayLike, competitor_conc: npt.ArrayLike, *, tracer_kon: float | None,
    tracer_koff: float | None, tracer_conc: float | None, curve: npt.ArrayLike | None = None, intervals: str = "auto", max_nfev: int | None = None, strict: bool = True,
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
    tracer = _tracer_constants(tracer_kon, tracer_koff, tracer_conc)
    k_on, k_off, k_conc = tracer
    _not_constant(y, method)
    curves, idx = _group(t.size, curve, competitor_conc)
    concs = np.array([c.conc for c in curves])
    if not np.any(concs > 0):
        raise FitError("competition kinetics needs at least one curve with competitor (concentration > 0)")
    _min_points(t.size, 4, method, idx, per_curve=3)
    ctx = {"tracer_kon": k_on, "tracer_koff": k_off, "tracer_conc": k_conc}

    def shape(k3: float, k4: float) -> FloatArray:
        return eq.motulsky_mahan_levels(t, idx, k_conc, k_on, k_off, concs, k3, k4, 1.0)

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
    prob = _Problem("motulsky-mahan", ps, t, y, idx, curves, ctx)
    fit = _run_vp(prob, ["kon", "koff"], lambda p: np.column_stack([shape(p["kon"], p["koff"]), ones]),
                  lambda c: {"bmax": float(c[0]), "baseline": float(c[1])},
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


