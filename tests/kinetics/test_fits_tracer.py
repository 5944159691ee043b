"""Competition kinetics: the tracer's own uncertainty, and the tracer-alone control check.

Data: Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9) closed form, itself checked against scipy solve_ivp in
test_equations.py, with seeded noise.  Tracer constants of the test vector in docs/REFERENCES.md
(k1 = 1e8 /M/min, k2 = 0.1 /min, k3 = 1e7 /M/min, k4 = 0.01 /min), in SI.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracker.errors import FitError
from tracker.kinetics import equations as eq
from tracker.kinetics import fit_competition_kinetics, fit_table

K1, K2, K3, K4, L = 1e8 / 60, 0.1 / 60, 1e7 / 60, 0.01 / 60, 1e-9
CONC = np.array([0.0, 3e-9, 1e-8, 3e-8])
TT = np.linspace(0, 240 * 60, 40)


@pytest.fixture(scope="module")
def plate():
    t = np.tile(TT, CONC.size)
    I = np.repeat(CONC, TT.size)
    y = eq.motulsky_mahan(t, L, K1, K2, I, K3, K4, 1000.0) + np.random.default_rng(21).normal(0, 5, t.size)
    return t, y, I


def test_tracer_intervals_widen_the_competitor_intervals_by_a_seeded_monte_carlo(plate):
    t, y, I = plate
    exact = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L)
    mc = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L,
                                  tracer_kon_ci=(K1 / 1.5, K1 * 1.5), tracer_koff_ci=(K2 / 1.5, K2 * 1.5), seed=3)
    assert mc.estimates["koff"] == exact.estimates["koff"]  # the point estimate is unchanged
    for name in ("kon", "koff", "kd", "residence_time"):
        assert mc.ci95[name][0] < exact.ci95[name][0] and mc.ci95[name][1] > exact.ci95[name][1]
        assert mc.ci_kinds[name] == "monte-carlo"
    assert mc.ci_kind == "monte-carlo"
    info = mc.extras["tracer_uncertainty"]
    assert info["seed"] == 3 and info["n_refits"] >= 50 and "Monte Carlo" in info["method"]
    assert mc.ci95["koff"][0] <= K4 <= mc.ci95["koff"][1]
    again = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L,
                                     tracer_kon_ci=(K1 / 1.5, K1 * 1.5), tracer_koff_ci=(K2 / 1.5, K2 * 1.5), seed=3)
    assert again.ci95 == mc.ci95  # seeded: the same draws give the same intervals


def test_a_tracer_interval_that_does_not_hold_the_tracer_constant_is_refused(plate):
    t, y, I = plate
    with pytest.raises(FitError, match="tracer koff interval"):
        fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L,
                                 tracer_koff_ci=(K2 * 2, K2 * 3))


def test_the_tracer_alone_curve_agrees_with_the_right_tracer_constants(plate):
    t, y, I = plate
    r = fit_competition_kinetics(t, y, I, tracer_kon=K1, tracer_koff=K2, tracer_conc=L)
    assert "tracer-constants-disagree" not in r.warning_codes
    # kobs of the tracer alone = k1*L + k2 (pseudo-first-order association; Motulsky & Mahan 1984 with I = 0)
    assert r.extras["tracer_check"]["expected_kobs_per_s"] == pytest.approx(K1 * L + K2)
    lo, hi = r.extras["tracer_check"]["kobs_ci95_per_s"]
    assert lo <= K1 * L + K2 <= hi


def test_wrong_tracer_constants_are_flagged_by_the_tracer_alone_curve(plate):
    t, y, I = plate
    r = fit_competition_kinetics(t, y, I, tracer_kon=3 * K1, tracer_koff=3 * K2, tracer_conc=L)
    assert "tracer-constants-disagree" in r.warning_codes
    # ... unless the stated tracer intervals are wide enough to include what the control shows
    wide = fit_competition_kinetics(t, y, I, tracer_kon=3 * K1, tracer_koff=3 * K2, tracer_conc=L,
                                    tracer_kon_ci=(K1 / 2, 6 * K1), tracer_koff_ci=(K2 / 2, 6 * K2), n_monte_carlo=40)
    assert "tracer-constants-disagree" not in wide.warning_codes


def test_fit_table_takes_the_tracer_intervals(plate):
    import pandas as pd

    t, y, I = plate
    df = pd.DataFrame({"time": t, "signal": y, "concentration": I})
    r = fit_table("competition-kinetics", df, tracer_kon=K1, tracer_koff=K2, tracer_conc=L,
                  tracer_kon_ci=(K1 / 1.2, K1 * 1.2), tracer_koff_ci=None, n_monte_carlo=40, seed=1)
    assert r.extras["tracer_uncertainty"]["n_draws"] == 40 and r.ci_kind == "monte-carlo"
