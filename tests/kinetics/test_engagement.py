"""Engagement under PK: exponential-integrator metrics against scipy solve_ivp, limits, trade facts.

References:
- scipy solve_ivp (computed; LSODA rtol 1e-11, atol 1e-14, event location for threshold crossings)
  of d(theta)/dt = kon C(t) (1 - theta) - koff theta, with C(t) written out below from the
  Bateman function (IUPAC Gold Book) and superposition (textbook PK, Rowland & Tozer);
- the rapid-equilibrium crossing of an iv bolus solved by hand: C0 e^-ke t = KD theta/(1 - theta);
- Dahl & Akerud 2013, Drug Discov Today 18:697-707 and Tonge 2018, ACS Chem Neurosci 9:29-39:
  residence time prolongs engagement only when koff < ke; after clearance theta decays with koff;
- facts of the trade marked `common practice`.

Tolerance for the exponential integrator against solve_ivp: 1e-4 relative (stated in the brief);
measured errors are typically 1e-6 or smaller (see benchmarks/bench_simulation.py).
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
TOL = 1e-4  # stated tolerance, exponential integrator vs solve_ivp


def _conc_function(route, cmax, tmax, hl, tau, n):
    ke = LN2 / hl
    if route == "oral":
        ka = float(pk.absorption_rate_from_tmax(tmax, ke))

        def shape(t):
            return (np.exp(-ke * t) - np.exp(-ka * t)) / (ka - ke)

        scale = cmax / shape(tmax)
        k_slow = min(ka, ke)
    else:

        def shape(t):
            return np.exp(-ke * t)

        scale = cmax
        k_slow = ke
    doses = [j * (tau or 0.0) for j in range(n)]

    def conc(t):
        return scale * sum(shape(t - d) for d in doses if t >= d)

    return conc, doses, k_slow


def _reference(kon, koff, route, cmax, tmax, hl, thr, tau=None, n=1):
    """Reference metrics from solve_ivp (computed: LSODA rtol 1e-11, atol 1e-14)."""
    conc, doses, k_slow = _conc_function(route, cmax, tmax, hl, tau, n)
    t_final = doses[-1] + (tmax or 0.0) + 60 / k_slow + 40 / koff
    edges = doses + [t_final]

    def ev(level, direction):
        f = lambda _t, y: y[0] - level  # noqa: E731
        f.direction = direction
        return f

    events = [ev(thr, 1), ev(thr, -1), ev(thr / 2, -1)]
    y0, ups, downs, half_downs, peak, peak_t = 0.0, [], [], [], 0.0, 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        sol = solve_ivp(lambda t, y: [kon * conc(t) * (1 - y[0]) - koff * y[0]], (a, b), [y0], method="LSODA",
                        rtol=1e-11, atol=1e-14, dense_output=True, events=events, first_step=1e-7 * (b - a))
        y0 = sol.y[0, -1]
        ups += list(sol.t_events[0])
        downs += list(sol.t_events[1])
        half_downs += list(sol.t_events[2])
        grid = np.linspace(a, b, 4001)
        vals = sol.sol(grid)[0]
        i = int(np.argmax(vals))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
        res = minimize_scalar(lambda x: -sol.sol(x)[0], bounds=(lo, hi), method="bounded", options={"xatol": 1e-9 * (b - a)})
        if -res.fun > peak:
            peak, peak_t = -res.fun, res.x
    out = {
        "onset": ups[0] if ups else math.nan,
        "offset": downs[-1] if downs else math.nan,
        "duration": sum(downs) - sum(ups) if ups else 0.0,
        "peak": peak,
        "pd_half": (half_downs[-1] - downs[-1]) if downs else math.nan,
    }
    if tau:
        # steady state by shooting: the interval map is affine, theta* = b/(1 - a) (computed)
        def _ss(t):  # steady state: all earlier doses, summed until negligible
            total, j = 0.0, 0
            while True:
                term = conc_single(t + j * tau)
                total += term
                if j > 5 and term < 1e-18 * total:
                    return total
                j += 1

        conc_single, _, _ = _conc_function(route, cmax, tmax, hl, None, 1)
        rhs = lambda t, y: [kon * _ss(t) * (1 - y[0]) - koff * y[0]]  # noqa: E731
        r0 = solve_ivp(rhs, (0, tau), [0.0], method="LSODA", rtol=1e-11, atol=1e-14).y[0, -1]
        r1 = solve_ivp(rhs, (0, tau), [1.0], method="LSODA", rtol=1e-11, atol=1e-14).y[0, -1]
        fixed = r0 / (1 - (r1 - r0))
        sol = solve_ivp(rhs, (0, tau), [fixed], method="LSODA", rtol=1e-11, atol=1e-14, dense_output=True)
        grid = np.linspace(0, tau, 4001)
        vals = sol.sol(grid)[0]
        i = int(np.argmin(vals))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
        res = minimize_scalar(lambda x: sol.sol(x)[0], bounds=(lo, hi), method="bounded", options={"xatol": 1e-9 * tau})
        out["trough"] = min(res.fun, vals.min())
    return out


SINGLE = [
    # kon (/M/s), koff (/s), route, free Cmax (M), tmax (s), half-life (s), threshold
    (1 / (5 * MIN) / NM, 1 / (5 * MIN), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3),  # fast dissociator
    (1 / (6 * H) / NM, 1 / (6 * H), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3),  # slow dissociator
    (1 / (5 * MIN) / NM, 1 / (5 * MIN), "iv", 2.42 * NM, None, 2 * H, 0.3),
    (1 / (6 * H) / NM, 1 / (6 * H), "iv", 2.42 * NM, None, 2 * H, 0.3),
    (3e5, 1 / H, "oral", 50 * NM, 8 * H, 2 * H, 0.5),  # flip-flop absorption
    (1e7, 1 / (30 * MIN), "oral", 100 * NM, 1 * H, 6 * H, 0.9),  # Cmax/KD ~ 1800, high threshold
    (2e6, 1 / (48 * H), "iv", 0.5 * NM, None, 30 * MIN, 0.2),  # PK much faster than dissociation
]


@pytest.fixture(scope="module")
def single_dose_results():
    cols = list(zip(*SINGLE))
    tmax = np.array([np.nan if v is None else v for v in cols[4]])
    m = engagement_metrics(np.array(cols[0]), np.array(cols[1]), np.array(cols[2]), np.array(cols[3]), tmax,
                           np.array(cols[5]), np.array(cols[6]))
    refs = [_reference(*case) for case in SINGLE]
    return m, refs


@pytest.mark.parametrize("i", range(len(SINGLE)))
def test_single_dose_metrics_match_solve_ivp_within_the_stated_tolerance(single_dose_results, i):
    # reference: scipy solve_ivp LSODA rtol 1e-11 (computed); tolerance 1e-4 relative
    m, refs = single_dose_results
    ref = refs[i]
    assert math.isfinite(ref["onset"])
    assert m.onset_s[i] == pytest.approx(ref["onset"], rel=TOL)
    assert m.offset_s[i] == pytest.approx(ref["offset"], rel=TOL)
    assert m.duration_above_threshold_s[i] == pytest.approx(ref["duration"], rel=TOL)
    assert m.peak_occupancy[i] == pytest.approx(ref["peak"], rel=TOL)
    assert m.pd_half_life_s[i] == pytest.approx(ref["pd_half"], rel=TOL)
    assert math.isnan(m.trough_occupancy[i])


MULTI = [
    (1 / (24 * H) / (0.5 * NM), 1 / (24 * H), "oral", 1 * NM, 1 * H, 4 * H, 0.5, 12 * H, 4),
    (1 / (2 * H) / NM, 1 / (2 * H), "iv", 3 * NM, None, 3 * H, 0.4, 8 * H, 3),
    (1 / (5 * MIN) / NM, 1 / (5 * MIN), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3, 24 * H, 2),
]


@pytest.mark.parametrize("case", MULTI, ids=["oral-slow-q12h", "iv-q8h", "oral-fast-q24h"])
def test_repeat_dosing_metrics_and_steady_state_trough_match_solve_ivp(case):
    # reference: scipy solve_ivp LSODA rtol 1e-11 (computed), steady state by shooting on the affine interval map
    *args, tau, n = case
    m = engagement_metrics(*args, dosing_interval=tau, n_doses=n)
    ref = _reference(*args, tau=tau, n=n)
    assert float(m.onset_s) == pytest.approx(ref["onset"], rel=TOL)
    assert float(m.offset_s) == pytest.approx(ref["offset"], rel=TOL)
    assert float(m.duration_above_threshold_s) == pytest.approx(ref["duration"], rel=TOL)
    assert float(m.peak_occupancy) == pytest.approx(ref["peak"], rel=TOL)
    assert float(m.trough_occupancy) == pytest.approx(ref["trough"], rel=TOL, abs=1e-9)


def test_a_batch_gives_each_compound_the_same_answer_as_computing_it_alone(single_dose_results):
    m, _ = single_dose_results
    for i in (0, 4, 6):
        kon, koff, route, cmax, tmax, hl, thr = SINGLE[i]
        alone = engagement_metrics(kon, koff, route, cmax, tmax, hl, thr)
        assert float(alone.onset_s) == pytest.approx(m.onset_s[i], rel=1e-12)
        assert float(alone.offset_s) == pytest.approx(m.offset_s[i], rel=1e-12)


def test_step_integrals_of_the_exponential_integrator_match_numerical_quadrature():
    # psi_j(z) = int_0^1 x^j e^{-z(1-x)} dx; reference: scipy quad (computed, epsrel 1e-13)
    from scipy.integrate import quad

    from tracker.kinetics.engagement import _psi012

    for z in (0.0, 1e-9, 0.05, 0.19999, 0.2, 0.7, 3.0, 60.0):
        got = _psi012(np.array([z]))
        for j in range(3):
            ref = quad(lambda x, j=j: x**j * math.exp(-z * (1 - x)), 0, 1, epsabs=0, epsrel=1e-13)[0]
            assert float(got[j][0]) == pytest.approx(ref, rel=1e-12)


def test_compounds_with_different_numbers_of_doses_can_share_one_call():
    kon, koff = np.array([1e6, 1e6]), np.array([1e-4, 1e-4])
    both = engagement_metrics(kon, koff, "oral", 2 * NM, H, 3 * H, 0.3, dosing_interval=12 * H, n_doses=np.array([1, 3]))
    one = engagement_metrics(1e6, 1e-4, "oral", 2 * NM, H, 3 * H, 0.3, dosing_interval=12 * H, n_doses=1)
    three = engagement_metrics(1e6, 1e-4, "oral", 2 * NM, H, 3 * H, 0.3, dosing_interval=12 * H, n_doses=3)
    assert both.offset_s[0] == pytest.approx(float(one.offset_s), rel=1e-12)
    assert both.offset_s[1] == pytest.approx(float(three.offset_s), rel=1e-12)
    assert both.offset_s[1] > both.offset_s[0] + 20 * H


# ----------------------------------------------------------------------------- limits
def test_rapid_equilibrium_offset_of_an_iv_bolus_equals_the_analytic_crossing_time():
    # C0 e^-ke t = KD thr/(1 - thr)  =>  t = ln(C0 (1 - thr)/(KD thr))/ke  (solved by hand)
    kd, c0, hl, thr = 2 * NM, 30 * NM, 3 * H, 0.4
    kon = 1e6
    m = engagement_metrics(kon, kon * kd, "iv", c0, None, hl, thr)
    expected = math.log(c0 * (1 - thr) / (kd * thr)) / (LN2 / hl)
    assert float(m.rapid_offset_s) == pytest.approx(expected, rel=1e-10)
    assert float(m.rapid_onset_s) == 0.0
    assert float(m.rapid_peak_occupancy) == pytest.approx(c0 / (c0 + kd), rel=1e-14)


def test_very_fast_binding_follows_the_rapid_equilibrium_curve_lagging_by_about_one_over_kobs():
    # koff >> ke and kon C >> ke: theta ~ C/(C + KD), trailing it by ~1/kobs (kobs = kon C + koff)
    kd, thr = 1 * NM, 0.5
    kon = 1e9
    m = engagement_metrics(kon, kon * kd, "oral", 5 * NM, 1 * H, 4 * H, thr)
    kobs_at_threshold = kon * kd * thr / (1 - thr) + kon * kd  # 2 /s
    lag_on = float(m.onset_s) - float(m.rapid_onset_s)
    lag_off = float(m.offset_s) - float(m.rapid_offset_s)
    assert 0 < lag_on < 2 / kobs_at_threshold
    assert 0 < lag_off < 2 / kobs_at_threshold
    assert float(m.peak_occupancy) == pytest.approx(float(m.rapid_peak_occupancy), rel=1e-4)


def test_after_clearance_engagement_decays_with_koff_so_pd_half_life_tends_to_ln2_rt():
    # Dahl & Akerud 2013; Tonge 2018: with PK much faster than dissociation, theta ~ e^-koff t
    rt = 24 * H
    m = engagement_metrics(1e6, 1 / rt, "iv", 100 * NM, None, 10 * MIN, 0.3)
    assert float(m.pd_half_life_s) == pytest.approx(LN2 * rt, rel=1e-6)
    assert float(m.terminal_half_life_s) == pytest.approx(LN2 * rt, rel=1e-12)
    # oral, absorption and elimination both much faster than koff (ka ~ ke ~ 1e-3 /s): same limit
    m2 = engagement_metrics(1e6, 1 / rt, "oral", 100 * NM, 15 * MIN, 10 * MIN, 0.3)
    assert float(m2.pd_half_life_s) == pytest.approx(LN2 * rt, rel=1e-6)


def test_residence_time_prolongs_engagement_only_when_koff_is_below_ke():
    # Dahl & Akerud 2013, Drug Discov Today 18:697-707: RT matters when koff < ke
    kd, hl = 0.1 * NM, 30 * MIN
    ke = LN2 / hl  # 3.9e-4 /s
    fast = engagement_metrics(1e8, 1e8 * kd, "oral", 10 * NM, 20 * MIN, hl, 0.3)  # koff = 1e-2 /s >> ke
    slow = engagement_metrics(1e5, 1e5 * kd, "oral", 10 * NM, 20 * MIN, hl, 0.3)  # koff = 1e-5 /s << ke
    assert 1e-2 > ke > 1e-5
    assert float(fast.offset_s) == pytest.approx(float(fast.rapid_offset_s), rel=0.02)
    assert float(slow.offset_s) > 3 * float(slow.rapid_offset_s)  # computed 7.7 x


def test_a_threshold_above_the_reachable_occupancy_has_no_onset_and_no_time_above():
    m = engagement_metrics(1e6, 1e-3, "oral", 0.1 * NM, 1 * H, 2 * H, 0.5)  # peak < C/(C+KD) = 9 %
    assert math.isnan(float(m.onset_s)) and math.isnan(float(m.offset_s))
    assert float(m.duration_above_threshold_s) == 0.0
    assert float(m.peak_occupancy) < 0.1


# ----------------------------------------------------------------------------- facts of the trade
def test_short_acting_profile_fast_dissociator_engages_within_minutes_and_clears_in_about_five_hours():
    # common practice: short-acting profile, PK half-life 2 h, threshold 30 %: an RT 5 min compound
    # reaches threshold within minutes and stays above ~5 h.  Choice made here: oral, tmax 30 min,
    # free Cmax 2 nM = 2 x KD (rapid-equilibrium occupancy at Cmax 67 %).  computed: onset 5.0 min,
    # offset 5.17 h; tolerance: onset < 10 min, offset within 10 % of 5 h.
    kd, rt = 1 * NM, 5 * MIN
    m = engagement_metrics(1 / rt / kd, 1 / rt, "oral", 2 * NM, 30 * MIN, 2 * H, 0.3)
    assert float(m.onset_s) < 10 * MIN
    assert float(m.offset_s) == pytest.approx(5 * H, rel=0.10)


def test_short_acting_profile_slow_dissociator_engages_only_after_hours_and_stays_much_longer():
    # common practice: an RT 6 h compound of the same affinity reaches threshold only after hours and
    # stays engaged much longer.  Same PK as above.  computed: onset 1.43 h (vs 5 min), offset 8.2 h
    # (vs 5.17 h); tolerance: onset > 1 h, offset >= 1.5 x the fast compound's.
    kd = 1 * NM
    fast = engagement_metrics(1 / (5 * MIN) / kd, 1 / (5 * MIN), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3)
    slow = engagement_metrics(1 / (6 * H) / kd, 1 / (6 * H), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3)
    assert float(slow.onset_s) > 1 * H
    assert float(slow.onset_s) > 10 * float(fast.onset_s)
    assert float(slow.offset_s) >= 1.5 * float(fast.offset_s)
    assert float(slow.pd_half_life_s) > float(fast.pd_half_life_s)


# ----------------------------------------------------------------------------- time series and input
def test_time_series_holds_concentration_occupancy_and_the_rapid_equilibrium_curve():
    kd = 1 * NM
    ts = engagement_timeseries(1 / (6 * H) / kd, 1 / (6 * H), "oral", 2 * NM, 30 * MIN, 2 * H)
    t, c, th, thr = ts["t_s"], ts["conc_M"], ts["occupancy"], ts["occupancy_rapid"]
    assert t.size == c.size == th.size == thr.size and t.size <= 2000
    assert np.all(np.diff(t) > 0) and t[0] == 0.0
    np.testing.assert_allclose(thr, c / (c + kd))
    m = engagement_metrics(1 / (6 * H) / kd, 1 / (6 * H), "oral", 2 * NM, 30 * MIN, 2 * H, 0.3)
    assert th.max() == pytest.approx(float(m.peak_occupancy), rel=1e-3)
    ref = pk.concentration(t, route="oral", cmax=2 * NM, half_life=2 * H, tmax=30 * MIN)
    np.testing.assert_allclose(c, ref, rtol=1e-12, atol=1e-30)


@pytest.mark.parametrize(
    "kwargs",
    [
        dict(threshold=0.0),
        dict(threshold=1.0),
        dict(kon=-1.0),
        dict(route="sc"),
        dict(tmax=None),
        dict(n_doses=3),  # no dosing interval
        dict(n_doses=0, dosing_interval=H),
    ],
)
def test_bad_engagement_input_raises_an_input_error(kwargs):
    base = dict(kon=1e6, koff=1e-3, route="oral", cmax=1 * NM, tmax=H, half_life=2 * H, threshold=0.3)
    base.update(kwargs)
    with pytest.raises(InputError):
        engagement_metrics(**base)


@pytest.mark.parametrize("wanted", [("onset_s", "offset_s", "duration_above_threshold_s"), ("peak_occupancy",), ("trough_occupancy",),
                                    ("rapid_onset_s", "pd_half_life_s")])
def test_asking_for_some_metrics_gives_them_unchanged_and_leaves_the_others_nan(wanted):
    # the grader asks only for the metrics its limits use; skipping the rest must not change those
    kon = np.array([1e6, 3e5, 2e7])
    koff = np.array([1e-4, 2e-3, 1e-5])
    args = (kon, koff, np.array(["oral", "iv", "oral"]), np.array([30 * NM, 200 * NM, 5 * NM]), np.array([H, np.nan, 2 * H]),
            np.array([4 * H, 3 * H, 8 * H]), 0.5, np.full(3, 24 * H))
    full = engagement_metrics(*args)
    some = engagement_metrics(*args, metrics=wanted)
    for name in full.keys():
        if name in wanted:
            np.testing.assert_array_equal(some[name], full[name])
        elif name != "terminal_half_life_s":  # closed form, always given
            assert np.all(np.isnan(some[name])), name
    assert np.all(np.isfinite(full[wanted[0]]))  # the comparison above compared numbers, not NaN with NaN


def test_an_unknown_metric_name_is_refused_with_the_known_names():
    with pytest.raises(InputError, match="unknown engagement metric 'onset'.*onset_s"):
        engagement_metrics(1e6, 1e-4, "iv", 10 * NM, None, H, 0.5, metrics=["onset"])
