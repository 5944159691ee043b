"""Engagement with target turnover and regimens judged at steady state, against an independent ODE.

Reference (computed: scipy solve_ivp LSODA rtol 1e-10, atol 1e-14, event location for threshold
crossings) of the turnover model written out here in full, two states, free target R and bound target
RL as fractions of the drug-free level R0 = ksyn/kdeg:

    dR/dt  = kdeg (1 - R) - kon C R + koff RL
    dRL/dt = kon C R - (koff + f kdeg) RL,          occupancy = RL/(R + RL)

with C(t) the Bateman function (IUPAC Gold Book) or an iv bolus, and steady-state concentrations by
superposition summed as geometric series (textbook PK, Rowland & Tozer).  The periodic steady state
comes from shooting on the affine interval map (computed).  Residence time lengthens engagement
only while dissociation is slower than the other losses (Dahl & Akerud 2013, Drug Discov Today
18:697-707; Tonge 2018, ACS Chem Neurosci 9:29-39); target resynthesis is one of them.
Tolerance: 1e-4 relative, the stated tolerance of the exponential integrator.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from tracker.errors import InputError
from tracker.kinetics import pk
from tracker.kinetics.engagement import engagement_metrics, engagement_timeseries

H = 3600.0
MIN = 60.0
NM = 1e-9
LN2 = math.log(2)
TOL = 1e-4
RTOL = 1e-10  # computed: scipy solve_ivp LSODA rtol 1e-10


def _conc(route, cmax, tmax, hl, tau=None):
    """Single-dose C(t) and, with tau, the steady-state C(t) after a dose (no later dose), closed-form sums."""
    ke = LN2 / hl
    if route == "oral":
        ka = float(pk.absorption_rate_from_tmax(tmax, ke))
        scale = cmax / ((math.exp(-ke * tmax) - math.exp(-ka * tmax)) / (ka - ke))

        def one(t):
            return scale * (math.exp(-ke * t) - math.exp(-ka * t)) / (ka - ke)

        def ss(t):
            return scale * (math.exp(-ke * t) / -math.expm1(-ke * tau) - math.exp(-ka * t) / -math.expm1(-ka * tau)) / (ka - ke)

        slow = min(ka, ke)
    else:
        def one(t):
            return cmax * math.exp(-ke * t)

        def ss(t):
            return cmax * math.exp(-ke * t) / -math.expm1(-ke * tau)

        slow = ke
    return one, (ss if tau else None), slow


def _rhs(kon, koff, kdeg, f, conc):
    def rhs(t, y):
        c = conc(t)
        r, b = y
        return [kdeg * (1 - r) - kon * c * r + koff * b, kon * c * r - (koff + f * kdeg) * b]
    return rhs


def _occ(y):
    return y[1] / (y[0] + y[1])


def _events(thr):
    up = lambda _t, y: _occ(y) - thr  # noqa: E731
    up.direction = 1
    down = lambda _t, y: _occ(y) - thr  # noqa: E731
    down.direction = -1
    return [up, down]


def _extreme(sol, a, b, sign):
    grid = np.linspace(a, b, 4001)
    vals = sign * _occ(sol.sol(grid))
    i = int(np.argmax(vals))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = minimize_scalar(lambda x: -sign * _occ(sol.sol(x)), bounds=(lo, hi), method="bounded",
                          options={"xatol": 1e-10 * (b - a)})
    return max(vals.max(), -res.fun) * sign


def reference(kon, koff, route, cmax, tmax, hl, thr, *, target_hl=None, f=1.0, tau=None):
    """Metrics of the turnover model by solve_ivp (computed: LSODA rtol 1e-10)."""
    kdeg = LN2 / target_hl if target_hl else 0.0
    one, ss, slow = _conc(route, cmax, tmax, hl, tau)
    loss = koff + f * kdeg
    t_final = (tmax or 0.0) + 60 / slow + 40 / loss
    sol = solve_ivp(_rhs(kon, koff, kdeg, f, one), (0, t_final), [1.0, 0.0], method="LSODA", rtol=RTOL, atol=1e-14,
                    dense_output=True, events=_events(thr), first_step=1e-9 * t_final)
    ups, downs = sol.t_events
    out = {"onset": ups[0] if len(ups) else math.nan, "offset": downs[-1] if len(downs) else math.nan,
           "duration": float(np.sum(downs) - np.sum(ups)) if len(ups) else 0.0,
           "peak": _extreme(sol, 0, min(t_final, (tmax or 0.0) + 30 / slow + 5 / loss), +1)}
    if tau:
        rhs = _rhs(kon, koff, kdeg, f, ss)

        def end(y0):
            return solve_ivp(rhs, (0, tau), y0, method="LSODA", rtol=RTOL, atol=1e-14).y[:, -1]

        if kdeg > 0:
            q = end([0.0, 0.0])
            p = np.column_stack([end([1.0, 0.0]) - q, end([0.0, 1.0]) - q])
            fixed = np.linalg.solve(np.eye(2) - p, q)
        else:  # total target conserved: shoot on the occupancy alone
            b = end([1.0, 0.0])[1]
            a = end([0.0, 1.0])[1] - b
            th = b / (1 - a)
            fixed = np.array([1 - th, th])
        per = solve_ivp(rhs, (0, tau), fixed, method="LSODA", rtol=RTOL, atol=1e-14, dense_output=True,
                        events=_events(thr), first_step=1e-9 * tau)
        u, d = per.t_events
        above0 = _occ(fixed) >= thr
        out["trough"] = _extreme(per, 0, tau, -1)
        out["steady_peak"] = _extreme(per, 0, tau, +1)
        out["steady_time_above"] = float(np.sum(d) - np.sum(u) + (tau if above0 else 0.0)) if (len(u) or len(d) or above0) else 0.0
        t_wash = 60 / slow + 40 / loss
        wash = solve_ivp(rhs, (0, t_wash), fixed, method="LSODA", rtol=RTOL, atol=1e-14, events=_events(thr),
                         first_step=1e-9 * t_wash)
        out["steady_offset"] = wash.t_events[1][-1] if len(wash.t_events[1]) else math.nan
    return out


CASES = [
    # kon, koff, route, free Cmax, tmax, PK half-life, threshold, target half-life
    (1e6, 1 / (7 * 24 * H), "oral", 20 * NM, 1 * H, 6 * H, 0.5, 8 * H),  # very slow dissociator, fast turnover
    (3e5, 1 / (2 * H), "oral", 50 * NM, 2 * H, 4 * H, 0.3, 24 * H),  # turnover slower than dissociation
    (2e6, 1 / (30 * 24 * H), "iv", 5 * NM, None, 3 * H, 0.4, 3 * H),
]


@pytest.mark.parametrize("case", CASES, ids=["slow-rt-fast-turnover", "turnover-slower", "iv"])
def test_single_dose_with_turnover_matches_the_two_state_ode(case):
    # computed: scipy solve_ivp LSODA rtol 1e-10 (two-state turnover model above); tolerance 1e-4
    *args, thl = case
    m = engagement_metrics(*args, target_half_life=thl)
    ref = reference(*args, target_hl=thl)
    assert float(m.onset_s) == pytest.approx(ref["onset"], rel=TOL)
    assert float(m.offset_s) == pytest.approx(ref["offset"], rel=TOL)
    assert float(m.duration_above_threshold_s) == pytest.approx(ref["duration"], rel=TOL)
    assert float(m.peak_occupancy) == pytest.approx(ref["peak"], rel=TOL)


@pytest.mark.parametrize("case", CASES, ids=["slow-rt-fast-turnover", "turnover-slower", "iv"])
@pytest.mark.parametrize("tau", [12 * H, 24 * H])
def test_steady_state_regimen_with_turnover_matches_the_two_state_ode(case, tau):
    # computed: scipy solve_ivp LSODA rtol 1e-10; steady state by shooting on the affine interval map
    *args, thl = case
    m = engagement_metrics(*args, dosing_interval=tau, target_half_life=thl)
    ref = reference(*args, target_hl=thl, tau=tau)
    assert float(m.trough_occupancy) == pytest.approx(ref["trough"], rel=TOL)
    assert float(m.steady_peak_occupancy) == pytest.approx(ref["steady_peak"], rel=TOL)
    assert float(m.steady_time_above_s) == pytest.approx(ref["steady_time_above"], rel=TOL, abs=1e-6 * tau)
    assert float(m.steady_offset_s) == pytest.approx(ref["steady_offset"], rel=TOL)


@pytest.mark.parametrize("f", [0.0, 0.5, 2.0])
@pytest.mark.parametrize("case", CASES, ids=["slow-rt-fast-turnover", "turnover-slower", "iv"])
def test_bound_target_degraded_at_its_own_rate_matches_the_two_state_ode(case, f):
    # computed: scipy solve_ivp LSODA rtol 1e-10 (two-state model, bound target degraded at f x kdeg:
    # f = 0 binding protects the target, f = 2 binding speeds its removal); tolerance 1e-4
    *args, thl = case
    m = engagement_metrics(*args, dosing_interval=24 * H, target_half_life=thl, bound_degradation_factor=f)
    single = engagement_metrics(*args, target_half_life=thl, bound_degradation_factor=f)
    ref1 = reference(*args, target_hl=thl, f=f)
    ref = reference(*args, target_hl=thl, f=f, tau=24 * H)
    assert float(single.onset_s) == pytest.approx(ref1["onset"], rel=TOL)
    assert float(single.offset_s) == pytest.approx(ref1["offset"], rel=TOL)
    assert float(single.duration_above_threshold_s) == pytest.approx(ref1["duration"], rel=TOL)
    assert float(single.peak_occupancy) == pytest.approx(ref1["peak"], rel=TOL)
    assert float(m.trough_occupancy) == pytest.approx(ref["trough"], rel=TOL)
    assert float(m.steady_peak_occupancy) == pytest.approx(ref["steady_peak"], rel=TOL)
    assert float(m.steady_time_above_s) == pytest.approx(ref["steady_time_above"], rel=TOL, abs=1e-6 * 24 * H)
    assert float(m.steady_offset_s) == pytest.approx(ref["steady_offset"], rel=TOL)


def test_protecting_the_bound_target_lengthens_engagement_and_speeding_its_removal_shortens_it():
    # direction check of the bound-target factor (computed values above): f = 0 > f = 1 > f = 2 offsets
    args = (1e6, 1 / (7 * 24 * H), "oral", 20 * NM, 1 * H, 6 * H, 0.5)
    off = [float(engagement_metrics(*args, target_half_life=8 * H, bound_degradation_factor=f).offset_s) for f in (0.0, 1.0, 2.0)]
    assert off[0] > off[1] > off[2]


def test_without_turnover_the_steady_state_metrics_match_the_one_state_ode():
    # computed: scipy solve_ivp LSODA rtol 1e-10 with kdeg = 0 (target stable), q12h oral
    args = (1 / (24 * H) / (0.5 * NM), 1 / (24 * H), "oral", 1 * NM, 1 * H, 4 * H, 0.5)
    m = engagement_metrics(*args, dosing_interval=12 * H)
    ref = reference(*args, tau=12 * H)
    for key, name in (("trough", "trough_occupancy"), ("steady_peak", "steady_peak_occupancy"),
                      ("steady_time_above", "steady_time_above_s"), ("steady_offset", "steady_offset_s")):
        assert float(m[name]) == pytest.approx(ref[key], rel=TOL), name


def test_resynthesis_pulls_the_trough_of_a_very_slow_dissociator_far_below_its_no_turnover_value():
    # Dahl & Akerud 2013; Tonge 2018: a residence time of a week cannot hold a target that is
    # replaced every few hours.  Without turnover the q24h trough is ~98 %; with a 2 h target
    # half-life the reference trough is 45 % (computed: solve_ivp LSODA rtol 1e-10).
    args = (1e6, 1 / (7 * 24 * H), "oral", 3 * NM, 1 * H, 4 * H, 0.5)
    stable = engagement_metrics(*args, dosing_interval=24 * H)
    turning = engagement_metrics(*args, dosing_interval=24 * H, target_half_life=2 * H)
    assert float(stable.trough_occupancy) > 0.98
    ref = reference(*args, target_hl=2 * H, tau=24 * H)
    assert float(turning.trough_occupancy) == pytest.approx(ref["trough"], rel=TOL)
    assert float(turning.trough_occupancy) < 0.5
    # the terminal decay: ln2/min(koff + kdeg, ke): dissociation (7 days x ln2) without turnover, the 4 h PK
    # half-life with it (koff + kdeg is faster than ke)
    assert float(stable.terminal_half_life_s) == pytest.approx(LN2 * 7 * 24 * H, rel=1e-12)
    assert float(turning.terminal_half_life_s) == pytest.approx(4 * H, rel=1e-12)


def test_steady_state_time_series_starts_at_the_periodic_state_and_ends_with_the_washout():
    args = dict(kon=1e6, koff=1 / (7 * 24 * H), route="oral", cmax=20 * NM, tmax=1 * H, half_life=6 * H)
    ts = engagement_timeseries(**args, dosing_interval=24 * H, steady_state=True, threshold=0.5, target_half_life=8 * H)
    m = engagement_metrics(**args, threshold=0.5, dosing_interval=24 * H, target_half_life=8 * H)
    t, th = ts["t_s"], ts["occupancy"]
    first = t <= 24 * H
    assert th[first].min() == pytest.approx(float(m.trough_occupancy), rel=1e-3)
    assert th[0] == pytest.approx(th[first][-1], rel=1e-6)  # periodic: the value at each dose repeats
    assert t[-1] > 24 * H + float(m.steady_offset_s)  # the washout is shown past the offset


@pytest.mark.parametrize("bad", [dict(target_half_life=-1.0), dict(target_half_life=math.inf), dict(bound_degradation_factor=-0.5)])
def test_bad_turnover_input_raises_an_input_error(bad):
    with pytest.raises(InputError):
        engagement_metrics(1e6, 1e-4, "iv", 10 * NM, None, H, 0.5, **bad)


def test_two_state_time_series_has_the_trough_and_offset_the_metrics_give():
    # bound target protected (f = 0.5): the chart series comes from the same two-state integrator as the metrics
    args = dict(kon=1e6, koff=1 / (7 * 24 * H), route="oral", cmax=3 * NM, tmax=1 * H, half_life=4 * H)
    kw = dict(target_half_life=2 * H, bound_degradation_factor=0.5)
    ts = engagement_timeseries(**args, dosing_interval=24 * H, steady_state=True, threshold=0.5, **kw)
    m = engagement_metrics(**args, threshold=0.5, dosing_interval=24 * H, **kw)
    first = ts["t_s"] <= 24 * H
    assert ts["occupancy"][first].min() == pytest.approx(float(m.trough_occupancy), rel=1e-3)
    above = ts["t_s"][(ts["t_s"] > 24 * H) & (ts["occupancy"] >= 0.5)]
    assert above.max() - 24 * H == pytest.approx(float(m.steady_offset_s), rel=2e-2)
