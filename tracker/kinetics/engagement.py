"""Target engagement under PK: occupancy theta(t) driven by a free-drug profile.

Model (one site, free drug, no target depletion, no rebinding):

    d theta/dt = kon C(t) (1 - theta) - koff theta,     theta(0) = 0

with C(t) from :mod:`tracker.kinetics.pk` (iv bolus or oral first-order
absorption, single or repeat dosing).  Beside it, the rapid-equilibrium curve
theta_rapid = C/(C + KD), what PK alone predicts.  Residence time prolongs
engagement only when koff < ke (Dahl & Akerud 2013, Drug Discov Today
18:697-707; Tonge 2018, ACS Chem Neurosci 9:29-39); after clearance theta
decays with koff.

Numerical method (vectorised over compounds; arrays (n_compounds, n_steps))
--------------------------------------------------------------------------
The ODE is linear in theta.  Write theta = theta_q + w with theta_q = C/(C+KD)
and use the "binding clock" sigma = integral of k = kon C + koff:

    dw/dsigma = -w + g,   g = -theta_q'/k = -KD C'/(kon (C + KD)^3)

Over each step the clock increment is Simpson's rule on k, and g is taken as
the quadratic through its values at the step's start, middle and end
(placed at their own clock times).  The step is then integrated EXACTLY:
w1 = w0 e^-Dsigma + Dsigma sum_j a_j psi_j(Dsigma), psi_j(z) = int_0^1 x^j
e^{-z(1-x)} dx.  This is an exponential integrator: exact for constant C
(where it reduces to the piecewise-constant-C solution) and, unlike the plain
midpoint-C version, it keeps theta on theta_q when binding is fast
(Dsigma >> 1), so rapid binders are not lagged by half a step.  The time grid
is per compound: log-spaced from a tiny time to the absorption/PK scale, then
uniform to a horizon where the remaining exposure can no longer move theta
(integral of kon C < 1e-9); beyond it theta decays as exp(-koff t) exactly.
Threshold crossings, peaks and troughs are refined inside their step with the
same within-step solution (Chandrupatla root finding), so onset and offset
are not limited by the grid.  Accuracy against scipy solve_ivp (rtol 1e-11):
see tests/kinetics/test_engagement*.py and benchmarks/bench_simulation.py.

Public API
----------
``engagement_metrics(kon, koff, route, cmax, tmax, half_life, threshold=0.3, dosing_interval=None, n_doses=1, metrics=None)``
    -> :class:`EngagementMetrics` of arrays (one entry per compound); ``metrics``
    names a subset to compute (the rest NaN).  Route
    ``"oral"`` or ``"iv"`` (for iv, ``cmax`` is the free concentration at
    t = 0 and ``tmax`` is ignored).  ``cmax`` is the single-dose free Cmax.
``engagement_timeseries(kon, koff, route, cmax, tmax, half_life, dosing_interval=None, n_doses=1, t_end=None, max_points=2000)``
    -> dict of 1-d arrays ``t_s``, ``conc_M``, ``occupancy``,
    ``occupancy_rapid`` for one compound, for charting.

Metrics (NaN where undefined; times in s from the first dose):

* ``onset_s``: first time theta >= threshold.  ``offset_s``: last time.
* ``duration_above_threshold_s``: total time above (gaps between doses excluded).
* ``peak_occupancy`` / ``peak_time_s``.
* ``trough_occupancy``: steady-state trough, the minimum of theta over one
  dosing interval of the periodic steady state (exact fixed point of the
  interval map); NaN without a dosing interval.
* ``pd_half_life_s``: after theta falls below threshold for the last time,
  the time it takes to halve (threshold -> threshold/2).  It tends to
  ln2 x RT when PK is much faster than dissociation.
  ``terminal_half_life_s``: ln2/min(koff, terminal PK rate), the asymptote.
* ``rapid_onset_s``, ``rapid_offset_s``, ``rapid_peak_occupancy``: the same
  for theta_rapid.
* ``steady_peak_occupancy``, ``steady_time_above_s``: the highest occupancy
  and the time above threshold within one dosing interval of the periodic
  steady state; ``steady_offset_s``: after the last dose of a regimen at
  steady state, the last time above threshold (from that dose).  NaN
  without a dosing interval.

Target turnover (``target_half_life``, ``bound_degradation_factor``; see
:func:`turnover_rates`): free and bound target as fractions of the drug-free
level, synthesis at kdeg, free target degraded at kdeg and bound target at
f kdeg.  With f = 1 the total stays 1 and the model is the one above with
koff + kdeg in place of koff (same integrator); f != 1 uses the two-state
exponential integrator of :mod:`tracker.kinetics.turnover`.

Deep flip-flop absorption (tmax up to 50/ke, :data:`~tracker.kinetics.pk.MAX_TMAX_KE`)
spans tens of decades of time; the grid starts wherever the threshold could
first be reached, however small a fraction of the whole that is.

These are models; they are decision support, not dosing advice.  An
underestimated affinity means more target coverage than assumed, with a risk
of mechanism-based toxicity; defer to qualified pharmacologists.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any, Iterable

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from .assay import find_root
from .equations import LN2
from .pk import Regimen

FloatArray = npt.NDArray[np.float64]

__all__ = ["EngagementMetrics", "engagement_metrics", "engagement_timeseries", "turnover_rates", "DEFAULT_STEPS"]

DEFAULT_STEPS = (320, 160)  # steps in the last (or only) interval, in each earlier dosing interval

_TAIL_EXPOSURE = 1e-9  # kon * integral of C left after the grid
_CHUNK = 100_000  # compounds x nodes per chunk (cache-sized: ~0.8 MB per array)


# ----------------------------------------------------------------------------- small math
_SERIES_Z = 0.2  # below this psi_j come from their Taylor series (10 terms: error < 1e-13)
_SERIES_N = 10
_SERIES_C = [np.array([1.0 / math.factorial(n + j + 1) * math.factorial(j) for n in range(_SERIES_N)]) for j in range(3)]


def _psi012(z: Any, e: Any = None) -> Any:
    """psi_j(z) = int_0^1 x^j exp(-z (1-x)) dx, j = 0, 1, 2 (z >= 0); ``e`` = exp(-z) if known.

    psi_j(z) = j! sum_n (-z)^n/(n+j+1)! near 0, else psi_0 = (1 - e^-z)/z,
    psi_1 = (1 - psi_0)/z, psi_2 = (1 - 2 psi_1)/z (integration by parts).
    """
    z = np.asarray(z, dtype=float)
    small = z < _SERIES_Z
    zl = np.where(small, 1.0, z)
    em1 = -np.expm1(-zl)
    p0 = em1 / zl
    p1 = (1.0 - p0) / zl
    p2 = (1.0 - 2.0 * p1) / zl
    if np.any(small):
        zs = -z[small]
        out = []
        for c in _SERIES_C:  # Horner in -z
            acc = np.full_like(zs, c[-1])
            for k in range(_SERIES_N - 2, -1, -1):
                acc = acc * zs + c[k]
            out.append(acc)
        p0[small], p1[small], p2[small] = out
    return p0, p1, p2


def _step_coeffs(h: Any, c0: Any, cm: Any, c1: Any, d0: Any, dm: Any, d1: Any, kon: Any, koff: Any) -> Any:
    """Clock increment and the quadratic (in clock time) of g = -KD C'/(kon (C+KD)^3) over each step."""
    kd = koff / kon
    k0 = koff + kon * c0
    km = koff + kon * cm
    k1 = koff + kon * c1
    # kon (C + KD) = k, so g = -KD C' kon^2 / k^3
    f = -kd * kon * kon
    g0 = f * d0 / (k0 * k0 * k0)
    gm = f * dm / (km * km * km)
    g1 = f * d1 / (k1 * k1 * k1)
    dsig = h * (k0 + 4.0 * km + k1) / 6.0
    ym = np.clip(h * (5.0 * k0 + 8.0 * km - k1) / (24.0 * dsig), 0.01, 0.99)
    a2 = ((gm - g0) - ym * (g1 - g0)) / (ym * (ym - 1.0))
    a1 = (g1 - g0) - a2
    return k0, km, k1, dsig, g0, a1, a2


def _forcing(dsig: Any, a0: Any, a1: Any, a2: Any) -> Any:
    """Exact contribution of the quadratic g over a step of clock length dsig (w0 = 0)."""
    p0, p1, p2 = _psi012(dsig)
    return dsig * (a0 * p0 + a1 * p1 + a2 * p2)


# ----------------------------------------------------------------------------- grids
def _grid_params(reg: Any, kon: Any, koff: Any, thr: Any) -> Any:
    """Per-compound scales for the step-size monitor (see :func:`_local_grid`)."""
    kd = koff / kon
    c_thr = kd * thr / (1.0 - thr)
    k_s = np.where(reg.oral, np.minimum(reg.ka, reg.ke), reg.ke)
    k_f = np.where(reg.oral, np.maximum(reg.ka, reg.ke), reg.ke)
    # first resolved time: oral C ~ Cmax t/tmax early, so resolve where theta_rapid could reach threshold
    ratio = np.clip(c_thr / reg.cmax, 1e-12, 1.0)
    s0 = np.where(reg.oral, reg.tmax * np.minimum(1e-4, 0.05 * ratio), 0.01 / reg.ke)
    # below C_ref the profile no longer moves theta much: steps may grow there
    cpeak = reg.cmax
    c_ref = 1e-3 * np.minimum(cpeak, kd)
    t_pk = np.where(reg.oral, reg.tmax, 0.0)
    s_ref = t_pk + np.log(np.maximum(cpeak / c_ref, 1.0)) / k_s
    return s0, k_s, k_f, s_ref, reg.oral


def _local_grid(params: Any, length: Any, n_steps: Any, n_pilot: Any = None) -> Any:
    """Nodes (rows, n_steps+1) on [0, length] equidistributing a step-size monitor.

    Monitor r(s) = 1/(s + s0) + (k_s + k_f e^{-(k_f-k_s) s/4}) w(s): relative
    resolution near 0 (an oral profile rises like t), the absorption and
    elimination rates after that, and w(s) = min(1, e^{-k_s (s - s_ref)/5})
    lets steps grow once C is too small to matter (the local error of the
    4th-order scheme is ~ h^5 r^4 C).  Nodes are placed at equal increments
    of the monitor's integral, computed on a geometric pilot grid.
    """
    s0, k_s, k_f, s_ref, oral = (np.asarray(a)[:, None] for a in params)
    length = np.asarray(length, dtype=float)
    n = s0.shape[0]
    p = n_pilot or max(64, n_steps // 2)
    # no floor on the first fraction: deep flip-flop absorption spans tens of decades (tmax up to 50/ke)
    f0 = np.clip(0.1 * s0 / length[:, None], 1e-300, 1e-3)
    frac = np.exp(np.log(f0) * np.linspace(1.0, 0.0, p)[None, :])
    sp = np.concatenate([np.zeros((n, 1)), frac * length[:, None]], axis=1)
    d = k_f - k_s
    absorb = np.where(oral, k_f * np.exp(-d * sp / 4.0), 0.0)
    weight = np.minimum(1.0, np.exp(-k_s * (sp - s_ref) / 5.0))
    r = 1.0 / (sp + s0) + (k_s + absorb) * weight
    u = np.concatenate([np.zeros((n, 1)), np.cumsum(0.5 * (r[:, 1:] + r[:, :-1]) * np.diff(sp, axis=1), axis=1)], axis=1)
    u /= u[:, -1:]
    # inverse interpolation, one row at a time (np.interp is C; the loop costs ~5 us a row, faster than one global search)
    target = np.linspace(0.0, 1.0, n_steps + 1)
    nodes = np.empty((n, n_steps + 1))
    for row in range(n):
        nodes[row] = np.interp(target, u[row], sp[row])  # u rises strictly, so nodes do too
    nodes[:, 0] = 0.0
    nodes[:, -1] = length
    return nodes


def _tail_length(reg: Any, kon: Any, koff: Any, thr: Any, cpeak: Any, m_last: Any = None) -> Any:
    """Local time after the last dose (``m_last``; default the regimen's last) beyond which C no longer matters."""
    kd = koff / kon
    c_thr = kd * thr / (1.0 - thr)
    k_term = np.where(reg.oral, np.minimum(reg.ka, reg.ke), reg.ke)
    t_pk = np.where(reg.oral, reg.tmax, 0.0)
    need = np.maximum(kon * cpeak / (k_term * _TAIL_EXPOSURE), 1e3 * cpeak / c_thr)
    length = t_pk + 1.15 * (np.log(np.maximum(need, math.e)) + 2.0) / k_term
    # verify: kon * C / (local decay rate) <= budget and C << C_threshold; extend otherwise
    if m_last is None:
        m_last = reg.n_doses - 1
    for _ in range(40):
        c, dc = reg.local(m_last, length)
        rate = np.maximum(-dc / np.where(c > 0, c, 1.0), 1e-300)
        bad = (c > 0) & ((kon * c / rate > _TAIL_EXPOSURE) | (c > 1e-3 * c_thr) | (dc > 0))
        if not bad.any():
            break
        length = np.where(bad, length * 1.3, length)
    return length


# ----------------------------------------------------------------------------- core
@dataclass
class _Run:
    """Grid and solution for one chunk of compounds (internal)."""

    reg: Regimen
    kon: np.ndarray
    koff: np.ndarray
    t: np.ndarray  # (n, M+1) global node times (boundary nodes repeated)
    s0: np.ndarray  # (n, M) local start of each step
    s1: np.ndarray  # (n, M) local end
    m: np.ndarray  # (M,) dose index of each step (inf = steady state; -1 = boundary pseudo-step)
    theta: np.ndarray  # (n, M+1)
    theta_q: np.ndarray  # (n, M+1) C/(C+KD) at the nodes (each interval's own limits at its ends)
    conc: np.ndarray  # (n, M+1) C at the nodes
    t_end: np.ndarray  # (n,)
    clock: np.ndarray  # (n,) integral of (kon C + koff) over the whole run


def _solve(reg: Any, kon: Any, koff: Any, thr: Any, steps: Any, *, steady_state: Any = False, theta_start: Any = None, washout: Any = False) -> Any:
    """Integrate theta over the regimen (or one steady-state interval) for all rows of ``reg``.

    ``washout=True``: the time after the last dose of a regimen at steady
    state (concentration of infinitely many earlier doses, no further dose),
    from ``theta_start`` to where C no longer matters.
    """
    n = kon.size
    kd = koff / kon
    n_last, n_int = steps
    params = _grid_params(reg, kon, koff, thr)
    if washout:
        cpeak = _single_peak(reg) * _accumulation(reg)
        intervals = [(np.inf, _tail_length(reg, kon, koff, thr, cpeak, m_last=np.inf), n_last)]
    elif steady_state:
        intervals = [(np.inf, reg.tau, n_last)]
    else:
        intervals = [(j, reg.tau, n_int) for j in range(reg.n_doses - 1)]
        cpeak = _peak_conc_estimate(reg)
        intervals.append((reg.n_doses - 1, _tail_length(reg, kon, koff, thr, cpeak), n_last))
    t_parts, s0_parts, s1_parts, m_parts = [], [], [], []
    th_parts, q_parts, c_parts = [], [], []
    theta0 = np.zeros(n) if theta_start is None else np.asarray(theta_start, dtype=float)
    clock = np.zeros(n)
    for j, (m, length, nst) in enumerate(intervals):
        sn = _local_grid(params, np.broadcast_to(length, (n,)), nst)
        sm = 0.5 * (sn[:, :-1] + sn[:, 1:])
        cn, dn = reg.local(m, sn)
        cm, dm = reg.local(m, sm)
        h = np.diff(sn, axis=1)
        kon2, koff2, kd2 = kon[:, None], koff[:, None], kd[:, None]
        _, _, _, dsig, g0, a1, a2 = _step_coeffs(h, cn[:, :-1], cm, cn[:, 1:], dn[:, :-1], dm, dn[:, 1:], kon2, koff2)
        thq = cn / (cn + kd2)
        clock += dsig.sum(axis=1)
        e = np.exp(-dsig)
        forcing = _forcing(dsig, g0, a1, a2)
        b = thq[:, 1:] - thq[:, :-1] * e + forcing
        e_t = np.ascontiguousarray(e.T)
        b_t = np.ascontiguousarray(b.T)
        th_t = np.empty((nst + 1, n))
        th_t[0] = theta0
        for i in range(nst):
            np.multiply(e_t[i], th_t[i], out=th_t[i + 1])
            th_t[i + 1] += b_t[i]
        th = th_t.T
        theta0 = th[:, -1]
        base: Any = 0.0 if (steady_state or washout) else (np.where(np.isfinite(reg.tau), reg.tau, 0.0) * j)
        tg = sn + (base[:, None] if np.ndim(base) else base)
        if j > 0:  # boundary pseudo-step joining the previous interval's end to this start
            t_parts.append(tg[:, :1])
            s0_parts.append(np.full((n, 1), np.nan))
            s1_parts.append(np.full((n, 1), np.nan))
            m_parts.append(np.array([-1.0]))
        else:
            t_parts.append(tg[:, :1])
        t_parts.append(tg[:, 1:])
        s0_parts.append(sn[:, :-1])
        s1_parts.append(sn[:, 1:])
        m_parts.append(np.full(nst, float(m)))
        th_parts.append(th)
        q_parts.append(thq)
        c_parts.append(cn)
    t_all = np.concatenate(t_parts, axis=1)
    return _Run(
        reg, kon, koff, t_all, np.concatenate(s0_parts, axis=1), np.concatenate(s1_parts, axis=1),
        np.concatenate(m_parts), np.concatenate(th_parts, axis=1), np.concatenate(q_parts, axis=1),
        np.concatenate(c_parts, axis=1), t_all[:, -1], clock,
    )


def _single_peak(reg: Any) -> Any:
    return np.where(reg.oral, _single_cmax(reg), reg.scale)


def _accumulation(reg: Any) -> Any:
    """Steady-state accumulation bound 1/(1 - e^-k tau) with the slower PK rate (1 without an interval)."""
    tau = np.where(np.isfinite(reg.tau), reg.tau, np.inf)
    return 1.0 / -np.expm1(-np.minimum(reg.ke, np.where(reg.oral, reg.ka, reg.ke)) * tau)


def _peak_conc_estimate(reg: Any) -> Any:
    """Upper estimate of the highest concentration over the regimen."""
    if reg.n_doses == 1 or not np.all(np.isfinite(reg.tau)):
        return _single_peak(reg)
    # steady-state accumulation bounds every dose's peak
    return _single_peak(reg) * _accumulation(reg)


def _single_cmax(reg: Any) -> Any:
    c, _ = reg.local(0, reg.tmax)
    return c


# ----------------------------------------------------------------------------- within-step evaluation
class _Steps:
    """Selected (row, step) pairs of a run, with everything needed inside the step."""

    def __init__(self, run: _Run, rows: Any, steps: Any) -> None:
        self.run = run
        self.rows = rows
        self.m = run.m[steps]
        self.s0 = run.s0[rows, steps]
        self.s1 = run.s1[rows, steps]
        self.t0 = run.t[rows, steps]
        self.h = self.s1 - self.s0
        self.kon = run.kon[rows]
        self.koff = run.koff[rows]
        self.kd = self.koff / self.kon
        self.theta0 = run.theta[rows, steps]
        c0, d0 = self.conc(self.s0)
        cm, dm = self.conc(self.s0 + 0.5 * self.h)
        c1, d1 = self.conc(self.s1)
        self.k0, self.km, self.k1, self.dsig, self.a0, self.a1, self.a2 = _step_coeffs(
            self.h, c0, cm, c1, d0, dm, d1, self.kon, self.koff
        )
        self.w0 = self.theta0 - c0 / (c0 + self.kd)

    def conc(self, s: Any, idx: Any = None) -> Any:
        sel = slice(None) if idx is None else idx
        m = self.m[sel]
        rows = self.rows[sel]
        c = np.empty(np.shape(s))
        d = np.empty(np.shape(s))
        for mv in np.unique(m):
            k = m == mv
            ck, dk = self.run.reg.local(mv if np.isinf(mv) else int(mv), np.asarray(s)[k], rows[k])
            c[k] = ck
            d[k] = dk
        return c, d

    def theta_at(self, x: Any, idx: Any) -> Any:
        """theta at fraction x of the step, for pairs idx."""
        h = self.h[idx]
        k0, km, k1 = self.k0[idx], self.km[idx], self.k1[idx]
        sig = h * (k0 * x + (-3 * k0 + 4 * km - k1) * x**2 / 2 + (2 * k0 - 4 * km + 2 * k1) * x**3 / 3)
        p0, p1, p2 = _psi012(sig)
        r = sig / self.dsig[idx]
        w = self.w0[idx] * np.exp(-sig) + sig * (self.a0[idx] * p0 + self.a1[idx] * r * p1 + self.a2[idx] * r * r * p2)
        c, _ = self.conc(self.s0[idx] + x * h, idx)
        return c / (c + self.kd[idx]) + w, w


def _refine_level(run: _Run, rows: Any, steps: Any, level: Any) -> Any:
    """Time where theta crosses ``level`` inside each selected step."""
    if rows.size == 0:
        return np.empty(0)
    st = _Steps(run, rows, steps)
    lev = np.broadcast_to(level, rows.shape)[...] if np.ndim(level) else np.full(rows.size, level)

    def f(x: Any, idx: Any) -> Any:
        th, _ = st.theta_at(x, idx)
        return th - lev[idx]

    x = find_root(f, np.zeros(rows.size), np.ones(rows.size), xtol=1e-12)
    x = np.where(np.isfinite(x), x, 0.5)
    return st.t0 + x * st.h


def _refine_extremum(run: _Run, rows: Any, steps: Any, kind: Any) -> Any:
    """Value of theta's local max (kind=+1) or min (-1) inside each step: there w = 0."""
    if rows.size == 0:
        return np.empty(0), np.empty(0)
    st = _Steps(run, rows, steps)

    def f(x: Any, idx: Any) -> Any:
        _, w = st.theta_at(x, idx)
        return w

    x = find_root(f, np.zeros(rows.size), np.ones(rows.size), xtol=1e-12)
    x = np.where(np.isfinite(x), x, 0.5)
    th, _ = st.theta_at(x, np.arange(rows.size))
    return th, st.t0 + x * st.h


def _conc_level_time(run: _Run, rows: Any, steps: Any, c_level: Any) -> Any:
    """Time where C crosses ``c_level`` inside the step (rapid-equilibrium crossings)."""
    if rows.size == 0:
        return np.empty(0)
    st = _Steps(run, rows, steps)
    lev = c_level

    def f(x: Any, idx: Any) -> Any:
        c, _ = st.conc(st.s0[idx] + x * st.h[idx], idx)
        return np.log(np.maximum(c, 1e-300)) - np.log(lev[idx])

    x = find_root(f, np.zeros(rows.size), np.ones(rows.size), xtol=1e-12)
    x = np.where(np.isfinite(x), x, 0.0)
    return st.t0 + x * st.h


# ----------------------------------------------------------------------------- crossings
def _crossings(values: Any, level: Any) -> Any:
    """Up- and down-crossing masks per step for node values (n, M+1) against level (n,)."""
    v0 = values[:, :-1] - level[:, None]
    v1 = values[:, 1:] - level[:, None]
    up = (v0 < 0) & (v1 >= 0)
    down = (v0 >= 0) & (v1 < 0)
    return up, down


def _first(mask: Any) -> Any:
    has = mask.any(axis=1)
    return has, np.argmax(mask, axis=1)


def _last(mask: Any) -> Any:
    has = mask.any(axis=1)
    return has, mask.shape[1] - 1 - np.argmax(mask[:, ::-1], axis=1)


def _theta_level_metrics(run: _Run, level: Any) -> Any:
    """first up-crossing, last down-crossing and total time above ``level`` (tail included)."""
    n = run.kon.size
    up, down = _crossings(run.theta, level)
    pseudo = run.m < 0
    up[:, pseudo] = False
    down[:, pseudo] = False
    r_up, s_up = np.nonzero(up)
    r_dn, s_dn = np.nonzero(down)
    t_up = _refine_level(run, r_up, s_up, level[r_up])
    t_dn = _refine_level(run, r_dn, s_dn, level[r_dn])
    first = np.full(n, np.nan)
    last = np.full(n, np.nan)
    dur = np.zeros(n)
    if r_up.size:
        # first up-crossing per row: rows are sorted, steps ascending within a row
        uniq, first_idx = np.unique(r_up, return_index=True)
        first[uniq] = t_up[first_idx]
        np.add.at(dur, r_up, -t_up)
    if r_dn.size:
        uniq_d = np.unique(r_dn)
        last_idx = np.searchsorted(r_dn, uniq_d, side="right") - 1
        last[uniq_d] = t_dn[last_idx]
        np.add.at(dur, r_dn, t_dn)
    # analytic tail: theta_end * exp(-koff (t - t_end))
    th_end = run.theta[:, -1]
    in_tail = th_end >= level
    t_tail = run.t_end + np.log(np.where(in_tail, th_end / level, 1.0)) / run.koff
    last = np.where(in_tail, t_tail, last)
    dur = np.where(in_tail, dur + t_tail, dur)
    # theta above the level at t = 0 cannot happen (theta(0) = 0 < level)
    dur = np.where(np.isnan(first), 0.0, dur)
    return first, last, dur


def _time_above(run: _Run, level: Any) -> Any:
    """Time above ``level`` within the run's grid (no tail); the run may start above the level."""
    n = run.kon.size
    up, down = _crossings(run.theta, level)
    pseudo = run.m < 0
    up[:, pseudo] = False
    down[:, pseudo] = False
    r_up, s_up = np.nonzero(up)
    r_dn, s_dn = np.nonzero(down)
    dur = np.zeros(n)
    if r_up.size:
        np.add.at(dur, r_up, -_refine_level(run, r_up, s_up, level[r_up]))
    if r_dn.size:
        np.add.at(dur, r_dn, _refine_level(run, r_dn, s_dn, level[r_dn]))
    dur -= np.where(run.theta[:, 0] >= level, run.t[:, 0], 0.0)
    dur += np.where(run.theta[:, -1] >= level, run.t_end, 0.0)
    return dur


def _rapid_metrics(run: _Run, thr: Any) -> Any:
    """onset/offset of theta_rapid = C/(C+KD) against thr; jumps at iv doses handled."""
    n = run.kon.size
    kd = run.koff / run.kon
    c_thr = kd * thr / (1.0 - thr)
    c_lvl = c_thr[:, None]
    c = run.conc  # node values; within an interval nodes are continuous
    above = c >= c_lvl
    # crossings inside steps (continuous) and at pseudo-steps (jumps at doses)
    up = ~above[:, :-1] & above[:, 1:]
    down = above[:, :-1] & ~above[:, 1:]
    pseudo = run.m < 0
    first = np.full(n, np.nan)
    last = np.full(n, np.nan)
    has_u, iu = _first(up)
    has_d, idn = _last(down)
    ru = np.nonzero(has_u)[0]
    su = iu[ru]
    jump_u = pseudo[su]
    tu = np.empty(ru.size)
    tu[jump_u] = run.t[ru[jump_u], su[jump_u]]
    nj = ~jump_u
    tu[nj] = _conc_level_time(run, ru[nj], su[nj], c_thr[ru[nj]])
    first[ru] = tu
    # iv: above at t = 0
    at0 = above[:, 0]
    first = np.where(at0, 0.0, first)
    rd = np.nonzero(has_d)[0]
    sd = idn[rd]
    jump_d = pseudo[sd]
    td = np.empty(rd.size)
    td[jump_d] = run.t[rd[jump_d], sd[jump_d]]
    nj = ~jump_d
    td[nj] = _conc_level_time(run, rd[nj], sd[nj], c_thr[rd[nj]])
    last[rd] = td
    peak_c = c.max(axis=1)
    # refine the concentration peak inside its step (dC/dt = 0), oral only
    ip = np.argmax(c, axis=1)
    peak_c = _refine_conc_peak(run, ip, peak_c)
    return first, last, peak_c / (peak_c + kd)


def _refine_conc_peak(run: _Run, ip: Any, peak_c: Any) -> Any:
    n = run.kon.size
    rows_all = np.arange(n)
    out = peak_c.copy()
    for side in (-1, 0):
        step = ip + side
        ok = (step >= 0) & (step < run.m.size) & run.reg.oral
        ok &= run.m[np.clip(step, 0, run.m.size - 1)] >= 0
        rows = rows_all[ok]
        steps = step[ok]
        if rows.size == 0:
            continue
        st = _Steps(run, rows, steps)
        _, d0 = st.conc(st.s0)
        _, d1 = st.conc(st.s1)
        has = (d0 > 0) & (d1 < 0)
        if not has.any():
            continue
        sub = np.nonzero(has)[0]

        def f(x: Any, idx: Any) -> Any:
            _, d = st.conc(st.s0[sub[idx]] + x * st.h[sub[idx]], sub[idx])
            return d

        x = find_root(f, np.zeros(sub.size), np.ones(sub.size), xtol=1e-13)
        cpk, _ = st.conc(st.s0[sub] + x * st.h[sub], sub)
        out[rows[sub]] = np.maximum(out[rows[sub]], cpk)
    return out


def _peak(run: _Run, kind: Any = +1) -> Any:
    """Global max (kind=+1) or min (kind=-1) of theta with refinement, and its time."""
    th = run.theta
    n = th.shape[0]
    i = np.argmax(th, axis=1) if kind > 0 else np.argmin(th, axis=1)
    val = th[np.arange(n), i]
    tim = run.t[np.arange(n), i]
    rows_all = np.arange(n)
    for side in (-1, 0):
        step = i + side
        ok = (step >= 0) & (step < run.m.size)
        ok &= run.m[np.clip(step, 0, run.m.size - 1)] >= 0
        rows, steps = rows_all[ok], step[ok]
        if rows.size == 0:
            continue
        w_start = run.theta[rows, steps] - run.theta_q[rows, steps]
        w_end = run.theta[rows, steps + 1] - run.theta_q[rows, steps + 1]
        # theta' = -k w: a max where w goes - -> +, a min where + -> -
        has = (w_start < 0) & (w_end > 0) if kind > 0 else (w_start > 0) & (w_end < 0)
        if not has.any():
            continue
        v, t = _refine_extremum(run, rows[has], steps[has], kind)
        better = (v > val[rows[has]]) if kind > 0 else (v < val[rows[has]])
        val[rows[has][better]] = v[better]
        tim[rows[has][better]] = t[better]
    return val, tim


# ----------------------------------------------------------------------------- public API
@dataclass(frozen=True, eq=False)
class EngagementMetrics:
    """Engagement metrics, one array entry per compound (see module docstring).

    Attribute or item access (``m.onset_s`` or ``m["onset_s"]``); ``to_dict()``
    gives the arrays, ``to_records()`` one JSON-ready dict per compound.
    """

    onset_s: np.ndarray
    offset_s: np.ndarray
    duration_above_threshold_s: np.ndarray
    peak_occupancy: np.ndarray
    peak_time_s: np.ndarray
    trough_occupancy: np.ndarray
    pd_half_life_s: np.ndarray
    terminal_half_life_s: np.ndarray
    rapid_onset_s: np.ndarray
    rapid_offset_s: np.ndarray
    rapid_peak_occupancy: np.ndarray
    steady_peak_occupancy: np.ndarray
    steady_time_above_s: np.ndarray
    steady_offset_s: np.ndarray

    def __getitem__(self, name: str) -> np.ndarray:
        if name not in self.keys():
            raise KeyError(name)
        value: np.ndarray = getattr(self, name)
        return value

    def keys(self) -> list[str]:
        return [f.name for f in fields(self)]

    def to_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.keys()}

    def to_records(self) -> list[dict[str, float | None]]:
        """One dict per compound; NaN becomes None (JSON null)."""
        names = [f.name for f in fields(self)]
        cols = [np.atleast_1d(getattr(self, k)) for k in names]
        return [
            {k: (None if not np.isfinite(v) else float(v)) for k, v in zip(names, row)}
            for row in zip(*cols)
        ]


def _prepare(kon: Any, koff: Any, route: Any, cmax: Any, tmax: Any, half_life: Any, threshold: Any, dosing_interval: Any) -> Any:
    kon = np.asarray(kon, dtype=float)
    koff = np.asarray(koff, dtype=float)
    for name, a in (("kon", kon), ("koff", koff)):
        if np.any(~np.isfinite(a)) or np.any(a <= 0):
            raise InputError(f"{name} must be positive and finite")
    thr = np.asarray(threshold, dtype=float)
    if np.any(~np.isfinite(thr)) or np.any(thr <= 0) or np.any(thr >= 1):
        raise InputError("threshold must be an occupancy strictly between 0 and 1")
    route_a = np.asarray(route)
    tmax_a = np.asarray(np.nan if tmax is None else tmax, dtype=float)
    tau_a = np.asarray(np.nan if dosing_interval is None else dosing_interval, dtype=float)
    cmax_a = np.asarray(cmax, dtype=float)
    hl_a = np.asarray(half_life, dtype=float)
    arrs = np.broadcast_arrays(kon, koff, route_a, cmax_a, tmax_a, hl_a, thr, tau_a)
    shape = arrs[0].shape
    return shape, [a.ravel() for a in arrs]


def engagement_metrics(
    kon: Any,
    koff: Any,
    route: Any,
    cmax: Any,
    tmax: Any,
    half_life: Any,
    threshold: Any = 0.3,
    dosing_interval: Any = None,
    n_doses: Any = 1,
    *,
    steps: tuple[int, int] = DEFAULT_STEPS,
    metrics: str | Iterable[str] | None = None,
    target_half_life: npt.ArrayLike | None = None,
    bound_degradation_factor: npt.ArrayLike = 1.0,
) -> EngagementMetrics:
    """Occupancy metrics under PK for arrays of compounds (SI units; see module docstring).

    Parameters broadcast together: ``kon`` (1/(M*s)), ``koff`` (1/s),
    ``route`` ("oral"/"iv"), ``cmax`` (free, M; iv: C at t = 0), ``tmax`` (s;
    oral), ``half_life`` (s), ``threshold`` (0-1), ``dosing_interval`` (s or
    None for a single dose), ``n_doses`` (int, or an int array: compounds are
    grouped by it).  ``steps``: grid steps (last interval, each earlier one).
    ``metrics``: names of the metrics wanted (default all); the others are
    NaN and their extra work is skipped (the steady-state trough costs two
    more integrations, the rapid-equilibrium metrics their own root searches).

    Target turnover: ``target_half_life`` (s; NaN or None = no turnover)
    and ``bound_degradation_factor`` (bound target degraded at this multiple
    of the free target's rate; default 1, alike).  See :func:`turnover_rates`.
    """
    wanted = _wanted(metrics)
    shape, (kon, koff, route, cmax, tmax, hl, thr, tau) = _prepare(
        kon, koff, route, cmax, tmax, half_life, threshold, dosing_interval
    )
    kdeg, fac = turnover_rates(target_half_life, bound_degradation_factor, shape)
    n = kon.size
    nd = np.broadcast_to(np.asarray(1 if n_doses is None else n_doses), shape).ravel()
    if np.any(nd < 1) or np.any(nd != np.round(nd)):
        raise InputError("number of doses must be a whole number >= 1")
    if np.any((nd > 1) & ~np.isfinite(tau)):
        raise InputError("repeat dosing needs a dosing interval")
    if np.any((kdeg > 0) & (fac != 1.0)):  # bound target degraded at its own rate: two states
        from .turnover import two_state_metrics

        res = two_state_metrics(kon, koff, route, cmax, tmax, hl, thr, tau, nd, kdeg, fac, steps, wanted, _METRIC_NAMES)
        return EngagementMetrics(**{k: res[k].reshape(shape) for k in _METRIC_NAMES})
    koff = koff + kdeg  # alike degradation: the bound state is left at koff + kdeg
    out = {f.name: np.full(n, np.nan) for f in fields(EngagementMetrics)}
    oral_rows = route == "oral"
    groups = [np.nonzero((nd == nval) & (oral_rows == o))[0] for nval in np.unique(nd) for o in (True, False)]
    for grp in groups:
        if grp.size == 0:
            continue
        nval = nd[grp[0]]
        per_node = (int(nval) - 1) * (steps[1] + 1) + steps[0] + 1
        chunk = max(1, _CHUNK // per_node)
        for start in range(0, grp.size, chunk):
            idx = grp[start : start + chunk]
            reg = Regimen.build(
                route[idx], cmax[idx], hl[idx], np.where(route[idx] == "oral", tmax[idx], np.nan),
                _tau_or_none(tau[idx]), int(nval),
            )
            res = _metrics_chunk(reg, kon[idx], koff[idx], thr[idx], steps, wanted)
            for k, v in res.items():
                out[k][idx] = v
    return EngagementMetrics(**{k: v.reshape(shape) for k, v in out.items()})


def turnover_rates(target_half_life: npt.ArrayLike | None, bound_degradation_factor: npt.ArrayLike = 1.0,
                   shape: tuple[int, ...] | None = None) -> tuple[FloatArray, FloatArray]:
    """(kdeg, factor) arrays: target degradation rate ln2/t1/2 (0 without turnover) and the bound-target factor.

    Target turnover (free target R, bound RL, both as fractions of the
    drug-free steady state R0 = ksyn/kdeg)::

        dR/dt  = kdeg (1 - R) - kon C R + koff RL
        dRL/dt = kon C R - (koff + f kdeg) RL,      occupancy theta = RL/(R + RL)

    With f = 1 (bound and free target degraded alike) R + RL stays 1 and
    d theta/dt = kon C (1 - theta) - (koff + kdeg) theta: turnover adds to
    koff, so the duration is set by the faster of dissociation and turnover.
    """
    thl = np.asarray(np.nan if target_half_life is None else target_half_life, dtype=float)
    fac = np.asarray(1.0 if bound_degradation_factor is None else bound_degradation_factor, dtype=float)
    if np.any(np.isfinite(thl) & (thl <= 0)) or np.any(np.isinf(thl)):
        raise InputError("target half-life must be positive and finite")
    if np.any(~np.isfinite(fac)) or np.any(fac < 0):
        raise InputError("bound-target degradation factor must be a finite number >= 0")
    with np.errstate(divide="ignore", invalid="ignore"):
        kdeg = np.where(np.isfinite(thl), LN2 / np.where(np.isfinite(thl), thl, 1.0), 0.0)
    if shape is not None:
        kdeg = np.broadcast_to(kdeg, shape).ravel()
        fac = np.broadcast_to(fac, shape).ravel()
    return kdeg, fac


def _tau_or_none(tau_i: Any) -> Any:
    if np.all(np.isnan(tau_i)):
        return None
    if np.any(np.isnan(tau_i)):
        raise InputError("give a dosing interval for every compound or for none")
    return tau_i


_METRIC_NAMES = tuple(f.name for f in fields(EngagementMetrics))


def _wanted(metrics: Any) -> frozenset[str]:
    if metrics is None:
        return frozenset(_METRIC_NAMES)
    wanted = frozenset([metrics] if isinstance(metrics, str) else metrics)
    unknown = wanted - set(_METRIC_NAMES)
    if unknown:
        raise InputError(f"unknown engagement metric {sorted(unknown)[0]!r} (known: {', '.join(_METRIC_NAMES)})")
    return wanted


_STEADY = frozenset({"trough_occupancy", "steady_peak_occupancy", "steady_time_above_s", "steady_offset_s"})


def _metrics_chunk(reg: Any, kon: Any, koff: Any, thr: Any, steps: Any, wanted: Any = frozenset(_METRIC_NAMES)) -> Any:
    n = kon.size
    nan = np.full(n, np.nan)
    out = {k: nan for k in _METRIC_NAMES}
    if wanted - _STEADY - {"terminal_half_life_s"}:
        run = _solve(reg, kon, koff, thr, steps)
        if wanted & {"onset_s", "offset_s", "duration_above_threshold_s", "pd_half_life_s"}:
            out["onset_s"], out["offset_s"], out["duration_above_threshold_s"] = _theta_level_metrics(run, thr)
        if wanted & {"peak_occupancy", "peak_time_s"}:
            out["peak_occupancy"], out["peak_time_s"] = _peak(run, +1)
        if "pd_half_life_s" in wanted:
            # PD half-life: from the last fall below threshold to threshold/2
            offset = out["offset_s"]
            _, off_half, _ = _theta_level_metrics(run, thr / 2.0)
            out["pd_half_life_s"] = np.where(np.isfinite(offset) & np.isfinite(off_half), off_half - offset, np.nan)
        if wanted & {"rapid_onset_s", "rapid_offset_s", "rapid_peak_occupancy"}:
            out["rapid_onset_s"], out["rapid_offset_s"], out["rapid_peak_occupancy"] = _rapid_metrics(run, thr)
    k_term = np.where(reg.oral, np.minimum(reg.ka, reg.ke), reg.ke)
    out["terminal_half_life_s"] = LN2 / np.minimum(koff, k_term)
    if wanted & _STEADY and np.all(np.isfinite(reg.tau)):
        out.update(_steady_metrics(reg, kon, koff, thr, steps, wanted))
    return {k: (v if k in wanted else nan) for k, v in out.items()}


def _steady_fixed_point(reg: Any, kon: Any, koff: Any, thr: Any, steps: Any) -> Any:
    """theta at each dose of the periodic steady state.

    The interval map theta -> a theta + b is affine (linear ODE); its fixed
    point b/(1-a) is the periodic solution's value at each dose.
    """
    probe = _solve(reg, kon, koff, thr, steps, steady_state=True, theta_start=np.zeros(kon.size))
    return probe.theta[:, -1] / -np.expm1(-probe.clock)


def _steady_metrics(reg: Any, kon: Any, koff: Any, thr: Any, steps: Any, wanted: Any) -> Any:
    """Trough, peak and time above threshold over one interval of the periodic steady state, and the
    offset after the last dose of a regimen at steady state (from that dose)."""
    n = kon.size
    out = {}
    fixed = _steady_fixed_point(reg, kon, koff, thr, steps)
    if wanted & {"trough_occupancy", "steady_peak_occupancy", "steady_time_above_s"}:
        run = _solve(reg, kon, koff, thr, steps, steady_state=True, theta_start=fixed)
        out["trough_occupancy"] = _peak(run, -1)[0] if "trough_occupancy" in wanted else np.full(n, np.nan)
        out["steady_peak_occupancy"] = _peak(run, +1)[0] if "steady_peak_occupancy" in wanted else np.full(n, np.nan)
        out["steady_time_above_s"] = _time_above(run, thr) if "steady_time_above_s" in wanted else np.full(n, np.nan)
    if "steady_offset_s" in wanted:
        wash = _solve(reg, kon, koff, thr, steps, washout=True, theta_start=fixed)
        _, last, _ = _theta_level_metrics(wash, thr)
        out["steady_offset_s"] = last
    return out


def engagement_timeseries(
    kon: float,
    koff: float,
    route: str,
    cmax: float,
    tmax: float | None,
    half_life: float,
    dosing_interval: float | None = None,
    n_doses: int = 1,
    *,
    threshold: float = 0.3,
    t_end: float | None = None,
    max_points: int = 2000,
    steps: tuple[int, int] = (1200, 400),
    steady_state: bool = False,
    target_half_life: float | None = None,
    bound_degradation_factor: float = 1.0,
) -> dict[str, Any]:
    """Time series for one compound: ``t_s``, ``conc_M``, ``occupancy``, ``occupancy_rapid``.

    Points are the integration grid (thinned to ``max_points``), extended by
    the exact exp(-koff t) tail when ``t_end`` lies beyond the grid.  Default
    ``t_end``: the latest of last dose + tmax + 5 half-lives and 1.5 x the
    offsets of theta and theta_rapid.

    ``steady_state=True`` (needs ``dosing_interval``): one dosing interval of
    the periodic steady state, then the last dose at ``t = tau`` and the
    washout after it (``n_doses`` is ignored); time 0 is a steady-state dose.
    Target turnover as in :func:`engagement_metrics` (``occupancy_rapid`` is
    then kon C/(kon C + koff + kdeg)).
    """
    if any(np.ndim(a) for a in (kon, koff, route, cmax, half_life)) or (tmax is not None and np.ndim(tmax)):
        raise InputError("engagement_timeseries takes one compound (scalars)")
    shape, (kon_a, koff_a, route_a, cmax_a, tmax_a, hl_a, thr_a, tau_a) = _prepare(
        kon, koff, route, cmax, tmax, half_life, threshold, dosing_interval
    )
    kdeg, fac = turnover_rates(target_half_life, bound_degradation_factor, shape)
    if steady_state and not np.isfinite(tau_a[0]):
        raise InputError("a steady-state time series needs a dosing interval")
    if kdeg[0] > 0 and fac[0] != 1.0:
        from .turnover import two_state_timeseries

        series: dict[str, Any] = two_state_timeseries(kon_a, koff_a, route_a, cmax_a, tmax_a, hl_a, thr_a, tau_a,
                                                      int(n_doses), kdeg, fac, steady_state, t_end, max_points, steps)
        return series
    koff_a = koff_a + kdeg
    reg = Regimen.build(route_a, cmax_a, hl_a, np.where(route_a == "oral", tmax_a, np.nan), _tau_or_none(tau_a),
                        1 if steady_state else int(n_doses))
    if steady_state:
        fixed = _steady_fixed_point(reg, kon_a, koff_a, thr_a, steps)
        ss = _solve(reg, kon_a, koff_a, thr_a, steps, steady_state=True, theta_start=fixed)
        run = _solve(reg, kon_a, koff_a, thr_a, steps, washout=True, theta_start=fixed)
        tau0 = float(reg.tau[0])
        t = np.r_[ss.t[0], tau0 + run.t[0]]
        th = np.r_[ss.theta[0], run.theta[0]]
        c = np.r_[ss.conc[0], run.conc[0]]
        t_grid_end = tau0 + float(run.t_end[0])
        last_dose = tau0
    else:
        run = _solve(reg, kon_a, koff_a, thr_a, steps)
        t, th, c = run.t[0], run.theta[0], run.conc[0]
        t_grid_end = float(run.t_end[0])
        last_dose = (int(n_doses) - 1) * (float(reg.tau[0]) if np.isfinite(reg.tau[0]) else 0.0)
    keep = np.r_[True, np.diff(t) > 0]  # drop repeated boundary nodes
    t, th, c = t[keep], th[keep], c[keep]
    kd = float(koff_a[0] / kon_a[0])
    if t_end is None:
        _, offset, _ = _theta_level_metrics(run, thr_a)
        r_on, r_off, _ = _rapid_metrics(run, thr_a)
        base = last_dose if steady_state else 0.0
        pk_scale = last_dose + float(reg.tmax[0]) + 5.0 * float(half_life)
        ends = [pk_scale] + [base + 1.5 * float(v[0]) for v in (offset, r_off) if np.isfinite(v[0])]
        t_end = max(ends)
    if t_end > t[-1]:
        extra = np.linspace(t[-1], t_end, 200)[1:]
        t = np.r_[t, extra]
        th = np.r_[th, th[-1] * np.exp(-koff_a[0] * (extra - t_grid_end))]
        if steady_state:
            c_extra, _ = reg.local(np.inf, (extra - last_dose)[None, :])
            c = np.r_[c, c_extra[0]]
        else:
            c = np.r_[c, reg.at(extra[None, :])[0]]
    else:
        sel = t <= t_end
        t, th, c = t[sel], th[sel], c[sel]
    if t.size > max_points:
        pick = np.unique(np.r_[np.linspace(0, t.size - 1, max_points).astype(int)])
        t, th, c = t[pick], th[pick], c[pick]
    return {"t_s": t, "conc_M": c, "occupancy": th, "occupancy_rapid": c / (c + kd)}
