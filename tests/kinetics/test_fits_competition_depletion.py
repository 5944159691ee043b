"""Competition kinetics with ligand depletion (receptor_conc): the integrated scheme and the fit.

Reference: scipy solve_ivp (DOP853, rtol 1e-11) of R + L <-> RL (k1, k2), R + I <-> RI (k3, k4) with free
L = L0 - RL, free I = I0 - RI and free R = R0 - RL - RI, coded here independently of the package (computed).
Limits: R0 << L0 gives the Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9) closed form; I0 = 0 gives the exact
depletion solution of one-ligand binding.  Constants: the docs/REFERENCES.md test vector in SI.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from tracker.kinetics import equations as eq
from tracker.kinetics import fit_competition_kinetics
from tracker.kinetics.fitting.curves import competition_with_depletion

K1, K2, K3, K4, L = 1e8 / 60, 0.1 / 60, 1e7 / 60, 0.01 / 60, 1e-9
CONC = np.array([0.0, 3e-9, 1e-8, 3e-8])
TT = np.linspace(0, 240 * 60, 40)


def reference(I0, R0, t=TT):
    def rhs(_, s):
        rl, ri = s
        r = R0 - rl - ri
        return [K1 * r * (L - rl) - K2 * rl, K3 * r * (I0 - ri) - K4 * ri]

    sol = solve_ivp(rhs, (0.0, float(t[-1])), [0.0, 0.0], t_eval=t, method="DOP853", rtol=1e-11, atol=1e-22)
    assert sol.success
    return sol.y[0]


def levels(R0):
    idx = np.repeat(np.arange(CONC.size), TT.size)
    return competition_with_depletion(np.tile(TT, CONC.size), idx, CONC, L, R0, K1, K2, K3, K4)


@pytest.mark.parametrize("R0", [1e-9, 3e-9, 1e-10])
def test_the_integrated_depletion_scheme_matches_an_independent_integration(R0):
    ref = np.concatenate([reference(I, R0) for I in CONC])
    np.testing.assert_allclose(levels(R0), ref, rtol=1e-6, atol=1e-7 * R0)


def test_its_limits_are_motulsky_mahan_and_one_ligand_depletion():
    R0 = 1e-15
    I = np.repeat(CONC, TT.size)
    mm = eq.motulsky_mahan(np.tile(TT, CONC.size), L, K1, K2, I, K3, K4)
    np.testing.assert_allclose(levels(R0) / R0, mm, rtol=1e-5, atol=1e-9)
    R0 = 2e-9
    np.testing.assert_allclose(levels(R0)[: TT.size], eq.depletion_association(TT, L, R0, K1, K2), rtol=1e-6,
                               atol=1e-9 * R0)


@pytest.fixture(scope="module")
def depleted_plate():
    R0 = 1e-9  # receptor equal to the tracer concentration
    y = np.concatenate([1000.0 * reference(I, R0) / R0 for I in CONC])
    y = y + np.random.default_rng(51).normal(0, 5, y.size)
    return np.tile(TT, CONC.size), y, np.repeat(CONC, TT.size), R0


def test_with_depletion_the_closed_form_fit_misses_k4_and_flags_the_tracer(depleted_plate):
    t, y, I, _ = depleted_plate
    r = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L)
    lo, hi = r.ci95["koff"]
    assert not lo <= K4 <= hi
    assert "tracer-constants-disagree" in r.warning_codes  # the tracer-alone curve runs too fast


def test_the_depletion_aware_fit_recovers_k3_and_k4(depleted_plate):
    t, y, I, R0 = depleted_plate
    r = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L, receptor_conc=R0)
    assert r.ci95["koff"][0] <= K4 <= r.ci95["koff"][1]
    assert r.ci95["kon"][0] <= K3 <= r.ci95["kon"][1]
    assert r.estimates["koff"] == pytest.approx(K4, rel=0.05)
    assert "tracer-constants-disagree" not in r.warning_codes
    assert "solve_ivp" in r.extras["depletion"]["model"]
    label = r.curve_labels[-1]
    np.testing.assert_allclose(r.curve(TT, label), r.estimates["baseline"] + r.estimates["bmax"] * reference(
        CONC[-1], R0) / R0 * 1.0, rtol=0.05, atol=5.0)
