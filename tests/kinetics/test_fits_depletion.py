"""Ligand depletion: the exact depletion model, and the naive fit's warning.

Reference for every data set here: scipy solve_ivp (LSODA, rtol 1e-10) of dB/dt = kon*(R0 - B)*(L0 - B) -
koff*B, B(0) = 0, the second-order binding scheme with the free ligand falling as it binds (computed).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from tracker.kinetics import equations as eq
from tracker.kinetics import fit_association

KON, KOFF = 1e6, 1e-3  # KD = 1 nM
T = np.linspace(0, 3600, 40)


def bound(L0, R0, t=T):
    sol = solve_ivp(lambda _, b: [KON * (R0 - b[0]) * (L0 - b[0]) - KOFF * b[0]], (0.0, float(t[-1])), [0.0],
                    t_eval=t, method="LSODA", rtol=1e-10, atol=1e-14 * R0)
    assert sol.success
    return sol.y[0]


@pytest.mark.parametrize("L0,R0", [(0.5e-9, 1e-9), (1e-9, 1e-9), (8e-9, 1e-9), (1e-9, 1e-11), (1e-10, 5e-9)])
def test_the_depletion_closed_form_matches_the_integrated_scheme(L0, R0):
    got = eq.depletion_association(T, L0, R0, KON, KOFF)
    np.testing.assert_allclose(got, bound(L0, R0), rtol=1e-6, atol=1e-9 * min(L0, R0))


def test_without_depletion_the_closed_form_is_pseudo_first_order_association():
    # R0 << L0: B/R0 -> L/(L+KD)*(1 - exp(-(kon*L + koff)*t)) (pseudo-first-order; common practice)
    np.testing.assert_allclose(eq.depletion_association(T, 2e-9, 1e-15, KON, KOFF) / 1e-15,
                               eq.association(T, 2e-9, KON, KOFF), rtol=1e-6)


@pytest.fixture(scope="module")
def receptor_near_kd():
    R0 = 1e-9  # receptor at KD
    Ls = np.array([0.5, 1.0, 2.0, 4.0, 8.0]) * 1e-9
    y = np.concatenate([1000.0 * bound(L, R0) / R0 for L in Ls]) + np.random.default_rng(11).normal(0, 5, 5 * T.size)
    return np.tile(T, Ls.size), y, np.repeat(Ls, T.size), R0


def test_with_the_receptor_near_kd_the_naive_fit_misses_koff_and_warns(receptor_near_kd):
    t, y, L, _ = receptor_near_kd
    naive = fit_association(t, y, L)
    lo, hi = naive.ci95["koff"]
    assert not lo <= KOFF <= hi  # the symptom: a confident, wrong koff ...
    assert "depletion-suspected" in naive.warning_codes  # ... now with a warning
    assert "receptor_conc" in dict(naive.warnings)["depletion-suspected"]


def test_the_depletion_aware_fit_recovers_koff_and_kon(receptor_near_kd):
    t, y, L, R0 = receptor_near_kd
    r = fit_association(t, y, L, receptor_conc=R0)
    assert r.ci95["koff"][0] <= KOFF <= r.ci95["koff"][1]
    assert r.ci95["kon"][0] <= KON <= r.ci95["kon"][1]
    assert r.estimates["koff"] == pytest.approx(KOFF, rel=0.05)
    assert "depletion-suspected" not in r.warning_codes
    assert r.extras["depletion"]["receptor_conc_M"] == R0
    # the stored curve redraws the depletion model
    np.testing.assert_allclose(r.curve(T, r.curve_labels[0]),
                               r.estimates["baseline"] + r.estimates["bmax"] * eq.depletion_association(
                                   T, 0.5e-9, R0, r.estimates["kon"], r.estimates["koff"]) / R0, rtol=1e-10)


def test_without_depletion_the_naive_fit_stays_quiet():
    R0 = 1e-12  # receptor far below KD
    Ls = np.array([0.5, 1.0, 2.0, 4.0, 8.0]) * 1e-9
    y = np.concatenate([1000.0 * bound(L, R0) / R0 for L in Ls]) + np.random.default_rng(12).normal(0, 5, 5 * T.size)
    r = fit_association(np.tile(T, Ls.size), y, np.repeat(Ls, T.size))
    assert "depletion-suspected" not in r.warning_codes
    assert r.ci95["koff"][0] <= KOFF <= r.ci95["koff"][1]


def test_the_depletion_model_needs_concentrations_and_a_positive_receptor():
    from tracker.errors import FitError

    y = 1000.0 * bound(2e-9, 1e-9) / 1e-9
    with pytest.raises(FitError, match="receptor concentration must be a positive"):
        fit_association(T, y, np.full(T.size, 2e-9), receptor_conc=-1.0)
    with pytest.raises(FitError, match="two or more concentrations, or a known koff"):
        fit_association(T, y, np.full(T.size, 2e-9), receptor_conc=1e-9)
    r = fit_association(T, y + 1.0, np.full(T.size, 2e-9), receptor_conc=1e-9, koff=KOFF)
    assert r.estimates["kon"] == pytest.approx(KON, rel=1e-3)
