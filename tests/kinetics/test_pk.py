"""PK profiles: Bateman, flip-flop, ka = ke, repeat dosing, against independent references.

References: IUPAC Gold Book (Bateman function, tmax = ln(ka/ke)/(ka - ke));
Garrett 1994, J Pharmacokinet Biopharm 22:103-128 (ka = ke: C ~ t e^-kt, tmax = 1/k);
Rowland & Tozer, Clinical Pharmacokinetics (textbook PK: accumulation R = 1/(1 - e^-ke tau), superposition);
scipy solve_ivp of the one-compartment ODEs (computed, LSODA or DOP853, rtol 1e-12, atol 1e-15).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from tracker.errors import InputError
from tracker.kinetics import pk

H = 3600.0


def _gut_central_ivp(ka, ke, dose_times, t_eval):
    """Reference: first-order absorption ODE (gut -> plasma), impulses at dose times (computed)."""
    out = np.zeros_like(t_eval)
    state = np.array([0.0, 0.0])
    edges = list(dose_times) + [t_eval[-1] + 1.0]
    for j, t0 in enumerate(dose_times):
        state = state + np.array([1.0, 0.0])
        t1 = edges[j + 1]
        sol = solve_ivp(lambda _t, y: [-ka * y[0], ka * y[0] - ke * y[1]], (t0, t1), state, method="DOP853",
                        rtol=1e-12, atol=1e-15, dense_output=True)
        sel = (t_eval >= t0) & (t_eval < t1)
        out[sel] = sol.sol(t_eval[sel])[1]
        state = sol.y[:, -1]
    return out


@pytest.mark.parametrize("tmax_h,hl_h", [(0.5, 2.0), (2.0, 12.0), (9.0, 2.0)])  # fast, ordinary, flip-flop
def test_oral_profile_matches_the_integrated_absorption_ode(tmax_h, hl_h):
    # reference: scipy solve_ivp LSODA rtol 1e-12 (computed); shape scaled to the same Cmax
    ke = math.log(2) / (hl_h * H)
    ka = float(pk.absorption_rate_from_tmax(tmax_h * H, ke))
    t = np.linspace(0, 10 * hl_h * H + 5 * tmax_h * H, 400)
    sol = solve_ivp(lambda _t, y: [-ka * y[0], ka * y[0] - ke * y[1]], (0, t[-1]), [1.0, 0.0], method="LSODA",
                    rtol=1e-12, atol=1e-15, dense_output=True)
    ref = sol.sol(t)[1]
    ref_tmax = minimize_scalar(lambda x: -sol.sol(x)[1], bounds=(0.2 * tmax_h * H, 3 * tmax_h * H),
                               method="bounded", options={"xatol": 1e-6}).x
    assert ref_tmax == pytest.approx(tmax_h * H, rel=1e-5)  # the solved ka reproduces tmax (IUPAC Gold Book)
    cmax_ref = sol.sol(tmax_h * H)[1]
    got = pk.concentration(t, route="oral", cmax=1.0, half_life=hl_h * H, tmax=tmax_h * H)
    np.testing.assert_allclose(got, ref / cmax_ref, rtol=1e-6, atol=1e-13)


def test_bateman_tmax_formula_inverts_the_absorption_rate_solver_on_both_branches():
    # IUPAC Gold Book: tmax = ln(ka/ke)/(ka - ke); tmax < 1/ke -> ka > ke, tmax > 1/ke -> flip-flop ka < ke
    ke = math.log(2) / (4 * H)
    tmax = np.array([0.01, 0.3, 0.999, 1.001, 3.0, 30.0]) / ke
    ka = pk.absorption_rate_from_tmax(tmax, ke)
    np.testing.assert_allclose(np.log(ka / ke) / (ka - ke), tmax, rtol=1e-12)
    assert np.all(ka[tmax < 1 / ke] > ke) and np.all(ka[tmax > 1 / ke] < ke)
    np.testing.assert_allclose(pk.bateman_tmax(ka, ke), tmax, rtol=1e-12)


def test_equal_absorption_and_elimination_rates_give_t_exp_minus_kt_with_tmax_one_over_k():
    # Garrett 1994, J Pharmacokinet Biopharm 22:103-128: ka = ke -> C ~ t e^-kt, tmax = 1/k
    ke = math.log(2) / (3 * H)
    assert float(pk.absorption_rate_from_tmax(1 / ke, ke)) == pytest.approx(ke, rel=1e-14)
    assert float(pk.bateman_tmax(ke, ke)) == pytest.approx(1 / ke, rel=1e-15)
    t = np.linspace(0, 20 / ke, 300)
    c = pk.concentration(t, route="oral", cmax=2.0, half_life=3 * H, tmax=1 / ke)
    np.testing.assert_allclose(c, 2.0 * (ke * t) * np.exp(1 - ke * t), rtol=1e-12, atol=1e-300)
    # and a tmax a hair away from 1/k gives (numerically) the same curve, no cancellation blow-up
    c2 = pk.concentration(t, route="oral", cmax=2.0, half_life=3 * H, tmax=(1 + 1e-9) / ke)
    np.testing.assert_allclose(c2, c, rtol=1e-7, atol=1e-300)


def test_iv_bolus_decays_with_the_elimination_half_life():
    t = np.array([0.0, 2 * H, 4 * H, 10 * H])
    c = pk.concentration(t, route="iv", cmax=8.0, half_life=2 * H)
    np.testing.assert_allclose(c, [8.0, 4.0, 2.0, 8.0 / 32], rtol=1e-14)


@pytest.mark.parametrize("route,tmax", [("oral", 1 * H), ("oral", 1 / (math.log(2) / (2 * H))), ("iv", None)])
def test_repeat_dosing_equals_superposed_single_doses(route, tmax):
    # Rowland & Tozer (textbook PK): superposition; reference: the single-dose curve shifted and summed
    tau, n = 8 * H, 5
    t = np.linspace(0, 60 * H, 1001) + 0.37  # avoid sampling exactly at dose times
    multi = pk.concentration(t, route=route, cmax=1.0, half_life=2 * H, tmax=tmax, dosing_interval=tau, n_doses=n)
    single = sum(
        np.where(t >= j * tau, pk.concentration(np.maximum(t - j * tau, 0.0), route=route, cmax=1.0, half_life=2 * H, tmax=tmax), 0.0)
        for j in range(n)
    )
    np.testing.assert_allclose(multi, single, rtol=1e-10, atol=1e-15)
    if route == "oral" and tmax == 1 * H:
        ke = math.log(2) / (2 * H)
        ka = float(pk.absorption_rate_from_tmax(tmax, ke))
        ref = _gut_central_ivp(ka, ke, [j * tau for j in range(n)], t)
        cmax_ref = _gut_central_ivp(ka, ke, [0.0], np.array([0.0, tmax]))[1]
        np.testing.assert_allclose(multi, ref / cmax_ref, rtol=1e-6, atol=1e-12)


def test_steady_state_accumulation_ratio_is_one_over_one_minus_exp_minus_ke_tau():
    # Rowland & Tozer (textbook PK): R = 1/(1 - exp(-ke tau)); for an iv bolus the steady-state
    # concentration just after a dose is R x C0
    ke = math.log(2) / (6 * H)
    tau = 12 * H
    r = float(pk.accumulation_ratio(ke, tau))
    assert r == pytest.approx(1 / (1 - math.exp(-ke * tau)), rel=1e-15)
    assert r == pytest.approx(4 / 3, rel=1e-12)  # tau = 2 half-lives
    c_ss = pk.concentration(np.array([0.0]), route="iv", cmax=1.0, half_life=6 * H, dosing_interval=tau, steady_state=True)
    assert float(c_ss[0]) == pytest.approx(r, rel=1e-13)
    many = pk.concentration(np.array([99 * tau + 1.0]), route="iv", cmax=1.0, half_life=6 * H, dosing_interval=tau, n_doses=100)
    assert float(many[0]) == pytest.approx(r * math.exp(-ke), rel=1e-12)


def test_oral_steady_state_matches_many_superposed_doses():
    tau = 6 * H
    t = np.linspace(0.5, tau - 0.5, 50)
    ss = pk.concentration(t, route="oral", cmax=1.0, half_life=3 * H, tmax=2 * H, dosing_interval=tau, steady_state=True)
    many = pk.concentration(t + 79 * tau, route="oral", cmax=1.0, half_life=3 * H, tmax=2 * H, dosing_interval=tau, n_doses=80)
    np.testing.assert_allclose(ss, many, rtol=1e-12)


@pytest.mark.parametrize(
    "kwargs",
    [
        dict(route="oral", cmax=1.0, half_life=2 * H),  # no tmax
        dict(route="im", cmax=1.0, half_life=2 * H),
        dict(route="iv", cmax=-1.0, half_life=2 * H),
        dict(route="iv", cmax=1.0, half_life=0.0),
        dict(route="iv", cmax=1.0, half_life=H, n_doses=3),  # repeat dosing without an interval
        dict(route="oral", cmax=1.0, half_life=60.0, tmax=10 * H),  # tmax absurdly long for the half-life
    ],
)
def test_bad_pk_input_raises_an_input_error(kwargs):
    with pytest.raises(InputError):
        pk.concentration(np.array([1.0]), **kwargs)
