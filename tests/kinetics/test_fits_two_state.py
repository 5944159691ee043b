"""Two-state (induced-fit) binding offered as a fitted alternative when kobs bends down.

Scheme R + L <-> RL <-> RL* with a fast first step.  Reference data: scipy solve_ivp (LSODA, rtol 1e-10) of the
full three-state scheme, signal RL + RL* (computed).  The hyperbolic kobs = k_rev + k_fwd*L/(L + K1) of the
rapid pre-equilibrium is the textbook form (from memory); the concave kobs plot as the sign of induced fit is
Vauquelin 2016, Br J Pharmacol 173:1268-1285.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from tracker.kinetics import equations as eq
from tracker.kinetics import fit_association

K1F, K1R, KF, KR = 1e7, 1.0, 0.01, 0.001  # K1 = 100 nM; overall KD = K1*KR/(KF + KR) ~ 9.1 nM
LS = np.array([10, 30, 100, 300, 1000]) * 1e-9
T = np.linspace(0, 3600, 41)


def two_step(L, t=T):
    def rhs(_, s):
        rl, rls = s
        r = 1.0 - rl - rls
        return [K1F * L * r - K1R * rl - KF * rl + KR * rls, KF * rl - KR * rls]

    sol = solve_ivp(rhs, (0.0, float(t[-1])), [0.0, 0.0], t_eval=t, method="LSODA", rtol=1e-10, atol=1e-13)
    assert sol.success
    return sol.y.sum(axis=0)


@pytest.mark.parametrize("L", LS)
def test_the_hyperbolic_kobs_is_the_slow_eigenvalue_of_the_two_step_scheme(L):
    # reference: numpy eigenvalues of the linear ODE d(RL, RL*)/dt (computed); rapid pre-equilibrium holds when
    # the first step (K1F*L + K1R >= 1.1 /s) is far faster than the second (<= 0.011 /s)
    m = np.array([[-(K1F * L + K1R + KF), KR - K1F * L], [KF, -KR]])
    slow = min(-np.linalg.eigvals(m).real)
    assert eq.induced_fit_kobs(L, KF, KR, K1R / K1F) == pytest.approx(slow, rel=0.01)


@pytest.fixture(scope="module")
def induced_fit_data():
    y = np.concatenate([1000.0 * two_step(L) for L in LS]) + np.random.default_rng(31).normal(0, 5, LS.size * T.size)
    return np.tile(T, LS.size), y, np.repeat(LS, T.size)


def test_induced_fit_data_prefer_the_two_state_model_and_recover_its_rates(induced_fit_data):
    t, y, L = induced_fit_data
    r = fit_association(t, y, L)
    ts = r.extras["two_state"]
    assert ts["preferred"] == "two-state" and "two-state-preferred" in r.warning_codes
    assert ts["f_test_p"] < 1e-6 and ts["delta_aicc"] > 10
    assert ts["k_fwd_per_s"] == pytest.approx(KF, rel=0.1)
    assert ts["k_rev_per_s"] == pytest.approx(KR, rel=0.2)
    assert ts["k1_M"] == pytest.approx(K1R / K1F, rel=0.3)
    assert ts["kd_M"] == pytest.approx(K1R / K1F * KR / (KF + KR), rel=0.3)


def test_one_step_data_keep_the_one_step_model():
    Ls = np.array([1, 3, 10, 30, 100]) * 1e-10
    t = np.tile(T, Ls.size)
    L = np.repeat(Ls, T.size)
    y = eq.association(t, L, 1e6, 1e-3, 1000.0) + np.random.default_rng(32).normal(0, 5, t.size)
    r = fit_association(t, y, L)
    assert r.extras["two_state"]["preferred"] == "one-step"
    assert "two-state-preferred" not in r.warning_codes


def test_the_two_state_comparison_needs_four_concentrations_and_can_be_switched_off(induced_fit_data):
    t, y, L = induced_fit_data
    assert "two_state" not in fit_association(t, y, L, two_state=False).extras
    keep = L <= 100e-9
    assert "two_state" not in fit_association(t[keep], y[keep], L[keep]).extras
