"""Engagement with target turnover when bound and free target are degraded at different rates (two states).

Free target R and bound target RL, as fractions of the drug-free level
R0 = ksyn/kdeg, occupancy theta = RL/(R + RL)::

    dR/dt  = kdeg (1 - R) - kon C R + koff RL
    dRL/dt = kon C R - (koff + f kdeg) RL

(f = 1 reduces to one state with koff + kdeg, handled by
:mod:`tracker.kinetics.engagement`; this module is used for f != 1.)

Numerical method: the state is linear, y' = A(C(t)) y + v with v = (kdeg, 0),
so each step uses the fourth-order Magnus exponential integrator with C at the
two Gauss points (Omega = h/2 (A1 + A2) + sqrt(3)/12 h^2 [A2, A1], the forcing
carried along as an augmented column), on the per-compound grids of the
one-state integrator.  The 2x2 exponential is closed-form
(Cayley-Hamilton: exp(Omega) = c0 I + c1 (Omega - m I)), and each step is
y1 = y_q + exp(Omega)(y0 - y_q) with y_q = -Omega^-1 omega, the frozen
equilibrium.  Crossings, peaks and troughs are refined inside their step by
cubic Hermite interpolation of theta with its ODE derivative at the nodes;
after the grid (C negligible) the free decay is solved in closed form.
The periodic steady state is the fixed point of the affine interval map
y -> P y + q.  Checked against scipy solve_ivp in
tests/kinetics/test_engagement_turnover.py.  The rapid-equilibrium metrics
are not defined here (NaN).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .assay import find_root
from .equations import LN2
from .pk import Regimen

_G = math.sqrt(3.0) / 6.0  # Gauss points at 1/2 -+ sqrt(3)/6
_M4 = math.sqrt(3.0) / 12.0


def _expm2(a: Any, b: Any, c: Any, d: Any) -> Any:
    """exp of [[a, b], [c, d]] elementwise (arrays), closed form."""
    m = 0.5 * (a + d)
    p = 0.5 * (a - d)
    disc = p * p + b * c
    dl = np.sqrt(np.abs(disc))
    real = disc >= 0
    em = np.exp(m)
    small = dl < 1e-3
    dls = np.where(small, 1.0, dl)
    with np.errstate(over="ignore", invalid="ignore"):
        c0r = 0.5 * (np.exp(m + dl) + np.exp(m - dl))
        c1r = np.where(small, em * (1 + dl * dl / 6 + dl**4 / 120), 0.5 * (np.exp(m + dl) - np.exp(m - dl)) / dls)
    c0i = em * np.cos(dl)
    c1i = em * np.where(small, 1 - dl * dl / 6 + dl**4 / 120, np.sin(dls) / dls)
    c0 = np.where(real, c0r, c0i)
    c1 = np.where(real, c1r, c1i)
    return c0 + c1 * p, c1 * b, c1 * c, c0 - c1 * p


class _TwoRun:
    """Nodes of a two-state run: t, r, b, theta, dtheta/dt (n, M+1), pseudo-step mask, end time."""

    def __init__(self, t: Any, r: Any, b: Any, conc: Any, pseudo: Any, kon: Any, koff: Any, kdeg: Any, kb: Any, pmat: Any = None) -> None:
        self.t, self.r, self.b, self.conc, self.pseudo = t, r, b, conc, pseudo
        tot = r + b
        dr = kdeg[:, None] * (1 - r) - kon[:, None] * conc * r + koff[:, None] * b
        dbv = kon[:, None] * conc * r - kb[:, None] * b
        with np.errstate(invalid="ignore", divide="ignore"):  # a probe from no target at all has no occupancy
            self.theta = b / tot
            self.dtheta = (dbv * tot - b * (dr + dbv)) / (tot * tot)
        self.kon, self.koff, self.kdeg, self.kb = kon, koff, kdeg, kb
        self.t_end = t[:, -1]
        self.pmat = pmat


def _run(reg: Any, kon: Any, koff: Any, kdeg: Any, fac: Any, thr: Any, steps: Any, *, mode: Any = "single", y_start: Any = None) -> Any:
    from .engagement import _accumulation, _grid_params, _local_grid, _peak_conc_estimate, _single_peak, _tail_length

    n = kon.size
    kb = koff + fac * kdeg
    k_eff = koff + kdeg * np.minimum(fac, 1.0)  # scales for the grid: the slower of the losses
    n_last, n_int = steps
    params = _grid_params(reg, kon, k_eff, thr)
    if mode == "washout":
        cpeak = _single_peak(reg) * _accumulation(reg)
        intervals = [(np.inf, _tail_length(reg, kon, k_eff, thr, cpeak, m_last=np.inf), n_last)]
    elif mode == "steady":
        intervals = [(np.inf, reg.tau, n_last)]
    else:
        intervals = [(j, reg.tau, n_int) for j in range(reg.n_doses - 1)]
        intervals.append((reg.n_doses - 1, _tail_length(reg, kon, k_eff, thr, _peak_conc_estimate(reg)), n_last))
    yr = np.ones(n) if y_start is None else y_start[0].copy()
    yb = np.zeros(n) if y_start is None else y_start[1].copy()
    ts, rs, bs, cs, ps = [], [], [], [], []
    pm = (np.ones(n), np.zeros(n), np.zeros(n), np.ones(n)) if mode == "steady" else None
    for j, (m, length, nst) in enumerate(intervals):
        sn = _local_grid(params, np.broadcast_to(length, (n,)), nst)
        h = np.diff(sn, axis=1)
        cn, _ = reg.local(m, sn)
        ca, _ = reg.local(m, sn[:, :-1] + (0.5 - _G) * h)
        cb, _ = reg.local(m, sn[:, :-1] + (0.5 + _G) * h)
        r_all = np.empty((n, nst + 1))
        b_all = np.empty((n, nst + 1))
        r_all[:, 0], b_all[:, 0] = yr, yb
        k2 = (kon[:, None], koff[:, None], kdeg[:, None], kb[:, None])
        # all steps' coefficients at once, then the (cheap) recursion over steps
        a11 = -(k2[2] + k2[0] * 0.5 * (ca + cb))
        a21 = k2[0] * 0.5 * (ca + cb)
        g = _M4 * h * h * (ca - cb) * k2[0]
        o11 = h * a11 + g * k2[1]
        o12 = h * k2[1] + g * k2[1]
        o21 = h * a21 + g * (k2[2] - k2[3])
        o22 = -h * k2[3] - g * k2[1]
        w1 = h * k2[2] + g * k2[2]
        w2 = -g * k2[2]
        det = o11 * o22 - o12 * o21
        yq_r = -(o22 * w1 - o12 * w2) / det
        yq_b = -(-o21 * w1 + o11 * w2) / det
        e11, e12, e21, e22 = _expm2(o11, o12, o21, o22)
        for i in range(nst):
            dr, db = r_all[:, i] - yq_r[:, i], b_all[:, i] - yq_b[:, i]
            r_all[:, i + 1] = yq_r[:, i] + e11[:, i] * dr + e12[:, i] * db
            b_all[:, i + 1] = yq_b[:, i] + e21[:, i] * dr + e22[:, i] * db
            if pm is not None:
                p11, p12, p21, p22 = pm
                pm = (e11[:, i] * p11 + e12[:, i] * p21, e11[:, i] * p12 + e12[:, i] * p22,
                      e21[:, i] * p11 + e22[:, i] * p21, e21[:, i] * p12 + e22[:, i] * p22)
        yr, yb = r_all[:, -1], b_all[:, -1]
        base = 0.0 if mode != "single" else np.where(np.isfinite(reg.tau), reg.tau, 0.0)[:, None] * j
        ts.append(sn + base)
        rs.append(r_all)
        bs.append(b_all)
        cs.append(cn)
        ps.append(np.r_[True, np.zeros(nst, dtype=bool)] if j > 0 else np.zeros(nst + 1, dtype=bool))
    pseudo = np.concatenate(ps)[1:]  # per step: True for the step joining two intervals
    return _TwoRun(np.concatenate(ts, axis=1), np.concatenate(rs, axis=1), np.concatenate(bs, axis=1),
                   np.concatenate(cs, axis=1), pseudo, kon, koff, kdeg, kb, pm)


# ----------------------------------------------------------------------------- within-step (cubic Hermite)
def _hermite(run: Any, rows: Any, steps: Any) -> Any:
    t0 = run.t[rows, steps]
    h = run.t[rows, steps + 1] - t0
    return t0, h, run.theta[rows, steps], run.theta[rows, steps + 1], run.dtheta[rows, steps] * h, run.dtheta[rows, steps + 1] * h


def _cubic(x: Any, y0: Any, y1: Any, m0: Any, m1: Any) -> Any:
    x2, x3 = x * x, x * x * x
    return (2 * x3 - 3 * x2 + 1) * y0 + (x3 - 2 * x2 + x) * m0 + (-2 * x3 + 3 * x2) * y1 + (x3 - x2) * m1


def _dcubic(x: Any, y0: Any, y1: Any, m0: Any, m1: Any) -> Any:
    x2 = x * x
    return (6 * x2 - 6 * x) * y0 + (3 * x2 - 4 * x + 1) * m0 + (-6 * x2 + 6 * x) * y1 + (3 * x2 - 2 * x) * m1


def _cross_times(run: Any, rows: Any, steps: Any, level: Any) -> Any:
    if rows.size == 0:
        return np.empty(0)
    t0, h, y0, y1, m0, m1 = _hermite(run, rows, steps)
    lev = level[rows]
    x = find_root(lambda x, i: _cubic(x, y0[i], y1[i], m0[i], m1[i]) - lev[i], np.zeros(rows.size), np.ones(rows.size), xtol=1e-12)
    return t0 + np.where(np.isfinite(x), x, 0.5) * h


def _extreme(run: Any, kind: Any) -> Any:
    th = run.theta
    n = th.shape[0]
    i = np.argmax(th, axis=1) if kind > 0 else np.argmin(th, axis=1)
    val = th[np.arange(n), i]
    rows_all = np.arange(n)
    for side in (-1, 0):
        step = i + side
        ok = (step >= 0) & (step < th.shape[1] - 1)
        ok &= ~run.pseudo[np.clip(step, 0, th.shape[1] - 2)]
        rows, steps = rows_all[ok], step[ok]
        if rows.size == 0:
            continue
        t0, h, y0, y1, m0, m1 = _hermite(run, rows, steps)
        has = (m0 > 0) & (m1 < 0) if kind > 0 else (m0 < 0) & (m1 > 0)
        if not has.any():
            continue
        sel = np.nonzero(has)[0]
        x = find_root(lambda x, k: _dcubic(x, y0[sel[k]], y1[sel[k]], m0[sel[k]], m1[sel[k]]), np.zeros(sel.size),
                      np.ones(sel.size), xtol=1e-13)
        v = _cubic(np.where(np.isfinite(x), x, 0.5), y0[sel], y1[sel], m0[sel], m1[sel])
        r = rows[sel]
        val[r] = np.maximum(val[r], v) if kind > 0 else np.minimum(val[r], v)
    return val


def _tail_theta(run: Any, rows: Any, s: Any) -> Any:
    """theta at time s after the grid end (C = 0: closed-form free decay)."""
    kdeg, kb, koff = run.kdeg[rows], run.kb[rows], run.koff[rows]
    re, be = run.r[rows, -1], run.b[rows, -1]
    b = be * np.exp(-kb * s)
    d = kdeg - kb
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(np.abs(d) > 1e-12 * kdeg, (np.exp(-kb * s) - np.exp(-kdeg * s)) / np.where(d == 0, 1.0, d),
                         s * np.exp(-kdeg * s))
    r = 1 + (re - 1) * np.exp(-kdeg * s) + koff * be * ratio
    return b / (r + b)


def _level_metrics(run: Any, level: Any, *, start_above_counts: Any = False) -> Any:
    """first up-crossing, last down-crossing and time above ``level`` (with the closed-form tail)."""
    n = run.theta.shape[0]
    v = run.theta - level[:, None]
    up = (v[:, :-1] < 0) & (v[:, 1:] >= 0)
    down = (v[:, :-1] >= 0) & (v[:, 1:] < 0)
    up[:, run.pseudo] = False
    down[:, run.pseudo] = False
    r_up, s_up = np.nonzero(up)
    r_dn, s_dn = np.nonzero(down)
    t_up = _cross_times(run, r_up, s_up, level)
    t_dn = _cross_times(run, r_dn, s_dn, level)
    first = np.full(n, np.nan)
    last = np.full(n, np.nan)
    dur = np.zeros(n)
    if r_up.size:
        uniq, fi = np.unique(r_up, return_index=True)
        first[uniq] = t_up[fi]
        np.add.at(dur, r_up, -t_up)
    if r_dn.size:
        uniq_d = np.unique(r_dn)
        last[uniq_d] = t_dn[np.searchsorted(r_dn, uniq_d, side="right") - 1]
        np.add.at(dur, r_dn, t_dn)
    start = run.theta[:, 0] >= level
    dur -= np.where(start, run.t[:, 0], 0.0)
    in_tail = run.theta[:, -1] >= level
    if in_tail.any():
        rows = np.nonzero(in_tail)[0]
        span = 60.0 / np.minimum(run.kb[rows], run.kdeg[rows])
        x = find_root(lambda x, i: _tail_theta(run, rows[i], x * span[i]) - level[rows[i]], np.zeros(rows.size),
                      np.ones(rows.size), xtol=1e-14)
        t_tail = run.t_end[rows] + x * span
        last[rows] = t_tail
        dur[rows] += t_tail
    if start_above_counts:
        first = np.where(start, run.t[:, 0], first)
    return first, last, dur


def _metrics(reg: Any, kon: Any, koff: Any, kdeg: Any, fac: Any, thr: Any, steps: Any, wanted: Any) -> Any:
    """Two-state engagement metrics for one chunk (keys as EngagementMetrics)."""
    n = kon.size
    steps = (2 * steps[0], 2 * steps[1])  # Hermite refinement: a finer grid than the one-state integrator
    out = {}
    run = _run(reg, kon, koff, kdeg, fac, thr, steps)
    out["onset_s"], out["offset_s"], out["duration_above_threshold_s"] = _level_metrics(run, thr)
    out["duration_above_threshold_s"] = np.where(np.isnan(out["onset_s"]), 0.0, out["duration_above_threshold_s"])
    out["peak_occupancy"] = _extreme(run, +1)
    out["peak_time_s"] = np.full(n, np.nan)
    _, off_half, _ = _level_metrics(run, thr / 2.0)
    out["pd_half_life_s"] = np.where(np.isfinite(out["offset_s"]) & np.isfinite(off_half), off_half - out["offset_s"], np.nan)
    k_term = np.where(reg.oral, np.minimum(reg.ka, reg.ke), reg.ke)
    out["terminal_half_life_s"] = LN2 / np.minimum(np.minimum(koff + fac * kdeg, kdeg), k_term)
    for k in ("rapid_onset_s", "rapid_offset_s", "rapid_peak_occupancy"):
        out[k] = np.full(n, np.nan)
    steady = ("trough_occupancy", "steady_peak_occupancy", "steady_time_above_s", "steady_offset_s")
    for k in steady:
        out[k] = np.full(n, np.nan)
    if np.all(np.isfinite(reg.tau)) and wanted & set(steady):
        fixed = steady_fixed_point(reg, kon, koff, kdeg, fac, thr, steps)
        per = _run(reg, kon, koff, kdeg, fac, thr, steps, mode="steady", y_start=fixed)
        out["trough_occupancy"] = _extreme(per, -1)
        out["steady_peak_occupancy"] = _extreme(per, +1)
        out["steady_time_above_s"] = _level_metrics_no_tail(per, thr)
        wash = _run(reg, kon, koff, kdeg, fac, thr, steps, mode="washout", y_start=fixed)
        _, out["steady_offset_s"], _ = _level_metrics(wash, thr)
    return out


def _level_metrics_no_tail(run: Any, level: Any) -> Any:
    v = run.theta - level[:, None]
    up = (v[:, :-1] < 0) & (v[:, 1:] >= 0)
    down = (v[:, :-1] >= 0) & (v[:, 1:] < 0)
    r_up, s_up = np.nonzero(up)
    r_dn, s_dn = np.nonzero(down)
    dur = np.zeros(run.theta.shape[0])
    np.add.at(dur, r_up, -_cross_times(run, r_up, s_up, level))
    np.add.at(dur, r_dn, _cross_times(run, r_dn, s_dn, level))
    dur -= np.where(run.theta[:, 0] >= level, run.t[:, 0], 0.0)
    dur += np.where(run.theta[:, -1] >= level, run.t_end, 0.0)
    return dur


def steady_fixed_point(reg: Any, kon: Any, koff: Any, kdeg: Any, fac: Any, thr: Any, steps: Any) -> Any:
    """(R, RL) at each dose of the periodic steady state: the fixed point of y -> P y + q."""
    n = kon.size
    probe = _run(reg, kon, koff, kdeg, fac, thr, steps, mode="steady", y_start=(np.zeros(n), np.zeros(n)))
    p11, p12, p21, p22 = probe.pmat
    q1, q2 = probe.r[:, -1], probe.b[:, -1]
    a, b, c, d = 1 - p11, -p12, -p21, 1 - p22
    det = a * d - b * c
    return (d * q1 - b * q2) / det, (-c * q1 + a * q2) / det


def two_state_metrics(kon: Any, koff: Any, route: Any, cmax: Any, tmax: Any, hl: Any, thr: Any, tau: Any, n_doses: Any, kdeg: Any, fac: Any, steps: Any, wanted: Any, names: Any) -> Any:
    """engagement_metrics for rows with turnover and a bound-target factor != 1 (arrays, SI)."""
    from .engagement import _tau_or_none

    n = kon.size
    nd = np.broadcast_to(np.asarray(1 if n_doses is None else n_doses), (n,))
    out = {k: np.full(n, np.nan) for k in names}
    one = ~((kdeg > 0) & (fac != 1.0))
    groups = []
    for nval in np.unique(nd):
        groups.append((nval, np.nonzero((nd == nval) & ~one)[0], True))
        groups.append((nval, np.nonzero((nd == nval) & one)[0], False))
    for nval, idx, two in groups:
        if idx.size == 0:
            continue
        reg = Regimen.build(route[idx], cmax[idx], hl[idx], np.where(route[idx] == "oral", tmax[idx], np.nan),
                            _tau_or_none(tau[idx]), int(nval))
        if two:
            res = _metrics(reg, kon[idx], koff[idx], kdeg[idx], fac[idx], thr[idx], steps, wanted)
        else:
            from .engagement import _metrics_chunk

            res = _metrics_chunk(reg, kon[idx], koff[idx] + kdeg[idx], thr[idx], steps, wanted)
        for k in names:
            if k in wanted:
                out[k][idx] = res[k]
    return out


def two_state_timeseries(kon: Any, koff: Any, route: Any, cmax: Any, tmax: Any, hl: Any, thr: Any, tau: Any, n_doses: Any, kdeg: Any, fac: Any, steady_state: Any, t_end: Any, max_points: Any, steps: Any) -> Any:
    """Time series (one compound) of the two-state model: t_s, conc_M, occupancy, occupancy_rapid (frozen equilibrium)."""
    from .engagement import _tau_or_none

    reg = Regimen.build(route, cmax, hl, np.where(route == "oral", tmax, np.nan), _tau_or_none(tau), 1 if steady_state else int(n_doses))
    if steady_state:
        fixed = steady_fixed_point(reg, kon, koff, kdeg, fac, thr, steps)
        per = _run(reg, kon, koff, kdeg, fac, thr, steps, mode="steady", y_start=fixed)
        wash = _run(reg, kon, koff, kdeg, fac, thr, steps, mode="washout", y_start=fixed)
        tau0 = float(reg.tau[0])
        t = np.r_[per.t[0], tau0 + wash.t[0]]
        th = np.r_[per.theta[0], wash.theta[0]]
        c = np.r_[per.conc[0], wash.conc[0]]
        last = wash
        shift = tau0
    else:
        last = _run(reg, kon, koff, kdeg, fac, thr, steps)
        t, th, c = last.t[0], last.theta[0], last.conc[0]
        shift = 0.0
    keep = np.r_[True, np.diff(t) > 0]
    t, th, c = t[keep], th[keep], c[keep]
    if t_end is None:
        _, off, _ = _level_metrics(last, thr)
        t_end = max(shift + float(reg.tmax[0]) + 5.0 * float(hl[0]), shift + 1.5 * float(off[0]) if np.isfinite(off[0]) else 0.0)
    if t_end > t[-1]:
        extra = np.linspace(t[-1], t_end, 200)[1:]
        th = np.r_[th, _tail_theta(last, np.zeros(extra.size, dtype=int), extra - shift - last.t_end[0])]
        cx = reg.local(np.inf, (extra - shift)[None, :])[0][0] if steady_state else reg.at(extra[None, :])[0]
        t, c = np.r_[t, extra], np.r_[c, cx]
    else:
        sel = t <= t_end
        t, th, c = t[sel], th[sel], c[sel]
    if t.size > max_points:
        pick = np.unique(np.linspace(0, t.size - 1, max_points).astype(int))
        t, th, c = t[pick], th[pick], c[pick]
    # frozen equilibrium at each C: RL/R = kon C/(koff + f kdeg)
    k_on, k_b = float(kon[0]), float(koff[0] + fac[0] * kdeg[0])
    rapid = k_on * c / (k_on * c + k_b)
    return {"t_s": t, "conc_M": c, "occupancy": th, "occupancy_rapid": rapid}
