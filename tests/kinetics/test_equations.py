"""Closed forms checked against an independent reference: numerical integration of
each scheme's differential equations with scipy solve_ivp (DOP853, rtol 1e-12),
plus the published limits and identities (sources beside each check).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from tracker.kinetics import equations as eq

ODE = dict(method="DOP853", rtol=1e-12, atol=1e-15)
REL = 1e-6


def integrate(rhs, y0, t):
    sol = solve_ivp(rhs, (0.0, float(t[-1])), y0, t_eval=t, **ODE)
    assert sol.success
    return sol.y


# ------------------------------------------------------------ single ligand
@pytest.mark.parametrize("conc", [1e-10, 1e-9, 3e-8])
def test_association_closed_form_matches_the_integrated_binding_equation(conc):
    kon, koff, bmax = 2e6, 3e-3, 1.0
    t = np.linspace(1.0, 3000.0, 60)
    # reference: scipy solve_ivp DOP853 rtol 1e-12 of dB/dt = kon*L*(Bmax-B) - koff*B (computed)
    ref = integrate(lambda _, b: kon * conc * (bmax - b) - koff * b, [0.0], t)[0]
    np.testing.assert_allclose(eq.association(t, conc, kon, koff, bmax), ref, rtol=REL)


def test_dissociation_closed_form_matches_the_integrated_first_order_decay():
    koff, b0, nsb = 4e-4, 800.0, 35.0
    t = np.linspace(1.0, 2e4, 60)
    # reference: scipy solve_ivp of dB/dt = -koff*B, B(0)=B0 (computed); NSB adds a constant
    ref = integrate(lambda _, b: -koff * b, [b0], t)[0] + nsb
    np.testing.assert_allclose(eq.dissociation(t, koff, b0, nsb), ref, rtol=REL)
    np.testing.assert_allclose(eq.one_phase_decay(t, koff, b0, nsb), ref, rtol=REL)


def test_half_life_of_the_dissociation_curve_is_ln2_over_koff():
    koff = 2e-3
    # t1/2 = ln2/koff (Copeland, Pompliano & Meek 2006, Nat Rev Drug Discov 5:730)
    t_half = brentq(lambda t: eq.dissociation(t, koff) - 0.5, 0, 1e5, xtol=1e-12)
    assert t_half == pytest.approx(np.log(2) / koff, rel=1e-9)


def test_two_phase_decay_matches_two_independent_populations_integrated():
    kf, ks, a, b = 1e-2, 5e-4, 300.0, 700.0
    t = np.linspace(1.0, 8000.0, 40)
    # reference: solve_ivp of two independent first-order decays (computed)
    ref = integrate(lambda _, y: [-kf * y[0], -ks * y[1]], [a, b], t).sum(axis=0)
    np.testing.assert_allclose(eq.two_phase_decay(t, kf, ks, a, b), ref, rtol=REL)


# ------------------------------------------------------------ Motulsky & Mahan
def mm_ode(t, L, k1, k2, I, k3, k4, bmax=1.0):
    """Scheme R+L <-> RL (k1,k2), R+I <-> RI (k3,k4), no depletion (Motulsky & Mahan 1984)."""

    def rhs(_, y):
        rl, ri = y
        r = bmax - rl - ri
        return [k1 * L * r - k2 * rl, k3 * I * r - k4 * ri]

    return integrate(rhs, [0.0, 0.0], t)[0]


def test_motulsky_mahan_reproduces_the_published_test_vector():
    # test vector from docs/REFERENCES.md (computed; matches ODE integration to ~1e-11):
    # k1=1e8 /M/min, k2=0.1 /min, k3=1e7 /M/min, k4=0.01 /min, L=1 nM, I=10 nM, Bmax=1
    t = np.array([1, 5, 10, 30, 60, 120, 240], float)
    expected = [0.086265, 0.249826, 0.278070, 0.174372, 0.106734, 0.084874, 0.083340]
    got = eq.motulsky_mahan(t, 1e-9, 1e8, 0.1, 10e-9, 1e7, 0.01)
    np.testing.assert_allclose(got, expected, atol=6e-7)
    assert eq.motulsky_mahan_equilibrium(1e-9, 1e8, 0.1, 10e-9, 1e7, 0.01) == pytest.approx(1 / 12, rel=1e-12)


@pytest.mark.parametrize(
    "k1,k2,k3,k4,L,I",
    [
        (1e8 / 60, 0.1 / 60, 1e7 / 60, 0.01 / 60, 1e-9, 1e-8),  # REFERENCES test vector in SI
        (3e6, 1e-2, 1e5, 1e-4, 2e-9, 3e-7),  # slow competitor: overshoot
        (3e6, 1e-3, 1e7, 5e-2, 1e-9, 1e-8),  # fast competitor
        (1e7, 2e-3, 2e6, 2e-3, 5e-9, 1e-9),  # equal koff
    ],
)
def test_motulsky_mahan_closed_form_matches_the_integrated_scheme(k1, k2, k3, k4, L, I):
    t = np.geomspace(1.0, 5e4, 60)
    # reference: scipy solve_ivp DOP853 rtol 1e-12 of the two-ligand scheme (computed)
    ref = mm_ode(t, L, k1, k2, I, k3, k4)
    np.testing.assert_allclose(eq.motulsky_mahan(t, L, k1, k2, I, k3, k4), ref, rtol=REL)


def test_motulsky_mahan_without_competitor_is_one_ligand_association():
    t = np.linspace(0, 3000, 40)
    # I = 0 reduces the scheme to association (Motulsky & Mahan 1984); a vanishing I approaches it continuously
    one = eq.association(t, 2e-9, 3e6, 1e-3)
    np.testing.assert_allclose(eq.motulsky_mahan(t, 2e-9, 3e6, 1e-3, 0.0, 1e6, 1e-4), one, rtol=1e-12)
    np.testing.assert_allclose(eq.motulsky_mahan(t[1:], 2e-9, 3e6, 1e-3, 1e-18, 1e6, 1e-4), one[1:], rtol=1e-6)


def test_motulsky_mahan_approaches_the_gaddum_equilibrium_at_long_times():
    k1, k2, k3, k4, L, I = 3e6, 1e-2, 1e5, 1e-4, 2e-9, 3e-7
    kd, ki = k2 / k1, k4 / k3
    # Gaddum / Cheng-Prusoff equilibrium: B = Bmax*(L/Kd)/(1 + L/Kd + I/Ki) (Cheng & Prusoff 1973, Biochem
    # Pharmacol 22:3099; Motulsky & Mahan 1984 t -> infinity)
    gaddum = (L / kd) / (1 + L / kd + I / ki)
    _, ks = eq.motulsky_mahan_rates(L, k1, k2, I, k3, k4)
    assert eq.motulsky_mahan(60.0 / ks, L, k1, k2, I, k3, k4) == pytest.approx(gaddum, rel=1e-9)


def test_motulsky_mahan_rates_are_the_eigenvalues_of_the_scheme_and_obey_vieta():
    k1, k2, k3, k4, L, I = 3e6, 1e-2, 1e5, 1e-4, 2e-9, 3e-7
    kf, ks = eq.motulsky_mahan_rates(L, k1, k2, I, k3, k4)
    ka, kb = k1 * L + k2, k3 * I + k4
    # KF+KS = KA+KB and KF*KS = k1*L*k4 + k2*k3*I + k2*k4 (Motulsky & Mahan 1984; docs/REFERENCES.md)
    assert kf + ks == pytest.approx(ka + kb, rel=1e-12)
    assert kf * ks == pytest.approx(k1 * L * k4 + k2 * k3 * I + k2 * k4, rel=1e-12)
    # reference: numpy eigenvalues of the linear ODE's matrix d(RL,RI)/dt = M (RL,RI) + c (computed)
    m = np.array([[-(k1 * L + k2), -k1 * L], [-k3 * I, -(k3 * I + k4)]])
    np.testing.assert_allclose(sorted(-np.linalg.eigvals(m).real), sorted([ks, kf]), rtol=1e-10)


@pytest.mark.parametrize("k3,k4", [(1e7 / 60, 0.01 / 60), (1e5, 1e-4), (1e7, 5e-2), (1e7, 1e-3)])
def test_the_level_wise_motulsky_mahan_used_by_the_fits_matches_the_integrated_scheme(k3, k4):
    # one coefficient set per competitor level (including I = 0), then two exponentials per point
    levels = np.array([0.0, 1e-9, 1e-8, 1e-7, 1e-6])
    tt = np.geomspace(1.0, 2e4, 30)
    t = np.tile(tt, levels.size)
    idx = np.repeat(np.arange(levels.size), 30)
    got = eq.motulsky_mahan_levels(t, idx, 2e-9, 1e7, 1e-3, levels, k3, k4, 3.0)
    # reference: scipy solve_ivp DOP853 rtol 1e-12 of the two-ligand scheme, per level (computed)
    ref = np.concatenate([3.0 * mm_ode(tt, 2e-9, 1e7, 1e-3, lv, k3, k4) for lv in levels])
    np.testing.assert_allclose(got, ref, rtol=REL)


def test_a_competitor_slower_than_the_tracer_makes_tracer_binding_overshoot():
    t = np.linspace(0, 240, 2401)
    b = eq.motulsky_mahan(t, 1e-9, 1e8, 0.1, 1e-8, 1e7, 0.01)  # k4 < k2 (docs/REFERENCES.md, Motulsky & Mahan 1984)
    b_inf = eq.motulsky_mahan_equilibrium(1e-9, 1e8, 0.1, 1e-8, 1e7, 0.01)
    assert b.max() > 3 * b_inf
    fast = eq.motulsky_mahan(t, 1e-9, 1e8, 0.1, 1e-8, 1e8, 1.0)  # k4 > k2: no overshoot
    assert fast.max() <= eq.motulsky_mahan_equilibrium(1e-9, 1e8, 0.1, 1e-8, 1e8, 1.0) * (1 + 1e-9)


# ------------------------------------------------------------ jump dilution, washout
@pytest.mark.parametrize("i_post", [0.0, 1e-9, 5e-9])
def test_jump_dilution_progress_curve_matches_the_integrated_enzyme_scheme(i_post):
    # E + I <-> EI (kon, koff) with I in excess after the dilution, product formed by free enzyme:
    # dEI/dt = kon*I*E - koff*EI, dP/dt = kcat*E, E = Et - EI (Copeland, Evaluation of Enzyme Inhibitors, from memory)
    kon, koff, kcat, et, ei0 = 1e6, 1e-3, 5.0, 1e-9, 0.97e-9
    t = np.linspace(0.0, 7200.0, 80)

    def rhs(_, y):
        ei, _p = y
        e = et - ei
        return [kon * i_post * e - koff * ei, kcat * e]

    ref = integrate(rhs, [ei0, 0.0], t)[1]  # reference: solve_ivp DOP853 rtol 1e-12 (computed)
    kobs = kon * i_post + koff
    vi = kcat * (et - ei0)
    vs = kcat * et / (1 + i_post / (koff / kon))
    got = eq.jump_dilution_progress(t, vi, vs, kobs)
    np.testing.assert_allclose(got[1:], ref[1:], rtol=REL)
    # kobs = koff*(1 + I_post/Ki) for a one-step competitive inhibitor (Copeland, from memory)
    assert eq.jump_dilution_kobs(koff, i_post, koff / kon) == pytest.approx(kobs, rel=1e-12)


def test_a_hundredfold_dilution_from_ten_times_ic50_overstates_koff_by_ten_percent():
    # design: pre-incubate at 10x IC50, dilute 100-fold -> I_post = 0.1 IC50; with IC50 = Kapp,
    # kobs = koff*(1 + 0.1) (Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery; from memory)
    kapp = 2e-9
    assert eq.jump_dilution_kobs(1e-3, 10 * kapp / 100, kapp) / 1e-3 == pytest.approx(1.10, rel=1e-12)


def test_washout_recovery_matches_integrated_dissociation_with_linear_response():
    # after washout free drug is zero: d(theta)/dt = -koff*theta; response R = Rmax*(1 - theta)
    # (occupancy-response linear; common practice)
    koff, rmax, f = 6e-4, 120.0, 0.85
    t = np.linspace(1.0, 1e4, 50)
    theta = integrate(lambda _, y: -koff * y, [f], t)[0]  # reference: solve_ivp (computed)
    np.testing.assert_allclose(eq.washout_recovery(t, rmax, f, koff), rmax * (1 - theta), rtol=REL)


# ------------------------------------------------------------ four-parameter logistic
def test_four_parameter_logistic_is_at_its_midpoint_at_the_ic50():
    # Y(IC50) = (Top+Bottom)/2 by definition of the logistic (DeLean, Munson & Rodbard 1978, from memory)
    assert eq.logistic4(3e-8, 5.0, 105.0, 3e-8, 1.3) == pytest.approx(55.0, rel=1e-12)


@pytest.mark.parametrize("hill,span", [(1.0, 81.0), (2.0, 9.0), (0.5, 6561.0)])
def test_four_parameter_logistic_spans_81_fold_from_10_to_90_percent_at_slope_one(hill, span):
    # the 10->90% span is 81^(1/nH)-fold (DeLean, Munson & Rodbard 1978, Am J Physiol 235:E97; from memory)
    def x_at(frac):  # dose giving `frac` inhibition, found numerically (computed)
        return 10 ** brentq(lambda lx: 1 - eq.logistic4(10**lx, 0, 1, 1e-7, hill) - frac, -20, 5, xtol=1e-14)

    assert x_at(0.9) / x_at(0.1) == pytest.approx(span, rel=1e-8)


def test_cheng_prusoff_converts_ic50_to_ki_and_back():
    # Ki = IC50/(1 + L/Kd) (Cheng & Prusoff 1973, Biochem Pharmacol 22:3099)
    assert eq.cheng_prusoff_ki(30e-9, 2e-9, 1e-9) == pytest.approx(10e-9)
    assert eq.cheng_prusoff_ic50(10e-9, 2e-9, 1e-9) == pytest.approx(30e-9)


def test_agonist_response_rises_from_baseline_to_emax_through_the_ec50():
    x = np.array([0.0, 1e-8, 1e3])
    y = eq.agonist_response(x, 10.0, 90.0, 1e-8, 1.0)
    np.testing.assert_allclose(y, [10.0, 50.0, 90.0], rtol=1e-9)
