"""Known-answer fits: data simulated from each published closed form (or from its
differential equations) with seeded Gaussian noise; the fit must recover the
parameters within the stated tolerance and its 95% interval must cover the truth.
In the manner of certified-reference-data tests (NIST StRD), the truth is known
exactly because we generated it.

Each test uses one fixed seed.  A 95% interval misses the truth in about one
seed in twenty by design; the calibration itself is checked by the coverage
test (test_fits_coverage.py), not here.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from tracker.errors import FitError
from tracker.kinetics import equations as eq
from tracker.kinetics.fitting import (
    fit_association,
    fit_competition_kinetics,
    fit_dissociation,
    fit_insurmountability,
    fit_jump_dilution,
    fit_ki_shift,
    fit_washout_recovery,
)


def rng(seed=20240611):
    return np.random.default_rng(seed)


def assert_recovered(result, name, truth, rel):
    est = result.estimates[name]
    lo, hi = result.ci95[name]
    assert est == pytest.approx(truth, rel=rel), f"{name}: {est:.4g} vs truth {truth:.4g}"
    assert lo <= truth <= hi, f"{name}: 95% interval {lo:.4g}-{hi:.4g} misses the truth {truth:.4g}"


# ------------------------------------------------------------ dissociation
def test_dissociation_recovers_koff_residence_time_and_half_life():
    t = np.linspace(0, 3600, 40)
    y = eq.one_phase_decay(t, 1e-3, 1000.0, 50.0) + rng().normal(0, 10, t.size)
    r = fit_dissociation(t, y)
    assert_recovered(r, "koff", 1e-3, 0.10)
    assert_recovered(r, "residence_time", 1000.0, 0.10)  # RT = 1/koff (Copeland, Pompliano & Meek 2006)
    assert_recovered(r, "half_life", np.log(2) * 1000.0, 0.10)
    assert r.r_squared > 0.99 and r.n_points == 40 and r.n_params == 3
    assert "biphasic" not in r.warning_codes and "rt-lower-bound" not in r.warning_codes


def test_replicate_dissociation_curves_share_koff_and_keep_their_own_amplitude():
    t = np.tile(np.linspace(0, 5400, 30), 3)
    span = np.repeat([800.0, 1000.0, 1200.0], 30)
    y = eq.one_phase_decay(t, 5e-4, span, 20.0) + rng(7).normal(0, 12, t.size)
    r = fit_dissociation(t, y, np.repeat(["r1", "r2", "r3"], 30))
    assert_recovered(r, "koff", 5e-4, 0.10)
    assert r.estimates["span[r3]"] == pytest.approx(1200, rel=0.05)
    assert r.curve_labels == ("r1", "r2", "r3")


def test_dissociation_with_little_decay_reports_residence_time_as_a_lower_bound():
    t = np.linspace(0, 3600, 40)
    true_rt = 5e4  # 7% decays in the hour
    y = eq.one_phase_decay(t, 1 / true_rt, 1000.0, 0.0) + rng(11).normal(0, 8, t.size)
    r = fit_dissociation(t, y)
    assert "rt-lower-bound" in r.warning_codes
    bound = r.estimates["residence_time_lower_bound"]
    assert 0 < bound <= true_rt
    assert r.to_json_keys()["residence_time_lower_bound_s"] == pytest.approx(bound)
    assert r.extras["rt_is_lower_bound"] is True


def test_biphasic_dissociation_is_flagged_and_its_two_rates_recovered():
    t = np.linspace(0, 7200, 60)
    y = eq.two_phase_decay(t, 8e-3, 2e-4, 500.0, 500.0) + rng(5).normal(0, 5, t.size)
    r = fit_dissociation(t, y)
    assert "biphasic" in r.warning_codes
    two = r.extras["two_phase"]
    assert two["k_fast_per_s"] == pytest.approx(8e-3, rel=0.25)
    assert two["k_slow_per_s"] == pytest.approx(2e-4, rel=0.25)


# ------------------------------------------------------------ association
def association_data(conc, kon=1e6, koff=1e-3, bmax=1000.0, sd=10.0, seed=3, n=30, tmax=1800.0):
    t = np.tile(np.linspace(0, tmax, n), len(conc))
    L = np.repeat(conc, n)
    return t, L, eq.association(t, L, kon, koff, bmax) + rng(seed).normal(0, sd, t.size)


def test_global_association_recovers_kon_koff_and_kd():
    t, L, y = association_data([1e-9, 3e-9, 1e-8, 3e-8])
    r = fit_association(t, y, L)
    assert_recovered(r, "kon", 1e6, 0.10)
    assert_recovered(r, "koff", 1e-3, 0.10)
    assert_recovered(r, "kd", 1e-9, 0.10)  # KD = koff/kon
    line = r.extras["kobs_line"]  # kobs = kon*L + koff: slope kon, intercept koff (common practice)
    assert line["slope"] == pytest.approx(1e6, rel=0.15)
    assert "kobs-curved" not in r.warning_codes


def test_one_association_curve_with_a_known_koff_gives_kon():
    t, L, y = association_data([1e-8], seed=4)
    r = fit_association(t, y, L, koff=1e-3)
    assert_recovered(r, "kobs", 1e6 * 1e-8 + 1e-3, 0.10)
    assert_recovered(r, "kon", 1e6, 0.10)  # kon = (kobs - koff)/L
    assert r.estimates["residence_time"] == pytest.approx(1000.0)
    no_koff = fit_association(t, y, L)
    assert "kon" not in no_koff.estimates and "kobs-only" in no_koff.warning_codes


def test_a_kobs_plot_that_bends_down_is_flagged_as_possible_induced_fit():
    # two-step binding R + L <-> RL <-> RL*: kobs = k-2 + k2*L/(K1 + L) saturates
    # (Vauquelin 2016, Br J Pharmacol 173:1268-1285)
    conc = np.array([3e-9, 1e-8, 3e-8, 1e-7, 3e-7, 1e-6])
    kobs = 1e-3 + 2e-2 * conc / (1e-7 + conc)
    t = np.tile(np.linspace(0, 1200, 40), conc.size)
    L = np.repeat(conc, 40)
    y = 1000 * L / (L + 5e-9) * -np.expm1(-np.repeat(kobs, 40) * t) + rng(9).normal(0, 5, t.size)
    r = fit_association(t, y, L)
    assert "kobs-curved" in r.warning_codes
    # the same design with one-step kinetics stays quiet
    t2, L2, y2 = association_data(conc, kon=2e4, koff=1e-3, sd=5.0, tmax=3600)
    assert "kobs-curved" not in fit_association(t2, y2, L2).warning_codes


def test_a_curve_at_equilibrium_by_its_first_reading_is_left_out_of_the_kobs_line():
    # kobs = kon*L + koff = 0.15 /s at 100 nM: at equilibrium long before the 2-min reading
    conc = [1e-9, 3e-9, 1e-8, 1e-7]
    t = np.tile(np.linspace(0, 2400, 21), 4)
    L = np.repeat(conc, 21)
    y = eq.association(t, L, 1.5e6, 2e-3, 1000.0) + rng(19).normal(0, 8, t.size)
    r = fit_association(t, y, L)
    assert "fast-vs-sampling" in r.warning_codes
    assert 1e-7 not in r.extras["kobs_line"]["concentrations_M"]
    assert r.extras["kobs_line"]["slope"] == pytest.approx(1.5e6, rel=0.25)  # slope = kon (common practice)
    assert_recovered(r, "kon", 1.5e6, 0.10)


# ------------------------------------------------------------ competition kinetics
def test_motulsky_mahan_global_fit_recovers_competitor_kon_and_koff():
    # tracer and competitor of the docs/REFERENCES.md test vector, in SI (Motulsky & Mahan 1984, Mol Pharmacol 25:1)
    k1, k2, k3, k4, L = 1e8 / 60, 0.1 / 60, 1e7 / 60, 0.01 / 60, 1e-9
    conc = np.array([0, 3e-9, 1e-8, 3e-8, 1e-7])
    t = np.tile(np.linspace(0, 240 * 60, 60), conc.size)
    I = np.repeat(conc, 60)
    y = eq.motulsky_mahan(t, L, k1, k2, I, k3, k4, 1000.0) + rng(13).normal(0, 5, t.size)
    r = fit_competition_kinetics(t, y, I, tracer_kon=k1, tracer_koff=k2, tracer_conc=L)
    assert_recovered(r, "kon", k3, 0.10)
    assert_recovered(r, "koff", k4, 0.10)
    assert_recovered(r, "kd", k4 / k3, 0.10)
    assert r.estimates["residence_time"] == pytest.approx(1 / r.estimates["koff"])


def test_a_competitor_too_slow_for_the_window_is_flagged():
    k1, k2, L = 1e6, 1e-3, 2e-9
    conc = np.array([0, 1e-8, 1e-7, 1e-6])
    t = np.tile(np.linspace(0, 1800, 40), conc.size)
    I = np.repeat(conc, 40)
    y = eq.motulsky_mahan(t, L, k1, k2, I, 1e5, 1e-5, 100.0) + rng(17).normal(0, 0.5, t.size)
    r = fit_competition_kinetics(t, y, I, tracer_kon=k1, tracer_koff=k2, tracer_conc=L)
    assert "slow-competitor" in r.warning_codes  # Georgi et al. 2019, Br J Pharmacol 176:4731


# ------------------------------------------------------------ jump dilution
def test_jump_dilution_recovers_koff_with_the_control_fixing_the_steady_state_rate():
    t = np.linspace(0, 3600, 60)
    noise = rng(21).normal(0, 15, 120)
    control = 5 + 2.0 * t + noise[:60]
    inhibited = eq.jump_dilution_progress(t, 0.1, 2.0, 1e-3, 3.0) + noise[60:]
    r = fit_jump_dilution(np.r_[t, t], np.r_[control, inhibited], ["control"] * 60 + ["cpd"] * 60)
    assert_recovered(r, "koff", 1e-3, 0.25)
    assert r.estimates["vs"] == pytest.approx(2.0, rel=0.02)
    assert "kobs-not-koff" in r.warning_codes and "no-control" not in r.warning_codes


def test_jump_dilution_correction_removes_the_rebinding_bias_of_a_hundredfold_dilution():
    # ODE data: E + I <-> EI with I_post = 0.1*Ki left after a 100-fold dilution from 10x IC50;
    # kobs = koff*(1 + I_post/Kapp) overstates koff by ~10% (Copeland, from memory)
    kon, koff, kcat, et = 1e6, 1e-3, 1.0, 1e-9
    ki = koff / kon
    i_post = 0.1 * ki
    t = np.linspace(0, 7200, 80)

    def rhs(_, y):
        e = et - y[0]
        return [kon * i_post * e - koff * y[0], kcat * e * 1e9]

    ode = solve_ivp(rhs, (0, t[-1]), [0.95 * et, 0.0], t_eval=t, method="DOP853", rtol=1e-10, atol=1e-20)
    noise = rng(23).normal(0, 20, 160)
    control = kcat * et * 1e9 * t + noise[:80]
    tt, yy, lab = np.r_[t, t], np.r_[control, ode.y[1] + noise[80:]], ["control"] * 80 + ["cpd"] * 80
    plain = fit_jump_dilution(tt, yy, lab)
    fixed = fit_jump_dilution(tt, yy, lab, post_dilution_conc=i_post, kapp=ki)
    # uncorrected, the fit sees the lower final rate and reports kobs ~ 1.1*koff
    assert "vs-differs-from-control" in plain.warning_codes and "kobs-not-koff" in plain.warning_codes
    assert plain.estimates["koff"] == pytest.approx(1.1e-3, rel=0.25)
    assert_recovered(fixed, "koff", koff, 0.25)
    assert plain.estimates["koff"] / fixed.estimates["koff"] == pytest.approx(1.1, rel=0.05)
    assert "koff-corrected" in fixed.warning_codes and "vs-differs-from-control" not in fixed.warning_codes


# ------------------------------------------------------------ washout
def test_washout_recovery_recovers_koff_and_the_blocked_fraction():
    t = np.linspace(0, 7200, 50)
    noise = rng(29).normal(0, 2, 100)
    r = fit_washout_recovery(
        np.r_[t, t], np.r_[100 + noise[:50], eq.washout_recovery(t, 100.0, 0.9, 5e-4) + noise[50:]],
        ["control"] * 50 + ["cpd"] * 50,
    )
    assert_recovered(r, "koff", 5e-4, 0.10)
    assert_recovered(r, "fraction[cpd]", 0.9, 0.10)


# ------------------------------------------------------------ Ki shift
def apparent_ic50(t_inc, L, k1, k2, k3, k4):
    """IC50 of tracer binding after incubation t_inc, found numerically on the Motulsky-Mahan curve (computed)."""
    b0 = eq.motulsky_mahan(t_inc, L, k1, k2, 0.0, k3, k4)
    return 10 ** brentq(lambda li: eq.motulsky_mahan(t_inc, L, k1, k2, 10**li, k3, k4) - b0 / 2, -14, -2, xtol=1e-12)


def test_ki_shift_of_a_slow_binder_matches_the_motulsky_mahan_prediction():
    k1, k2, k3, k4, L, kd = 1e7, 1e-2, 1e5, 2e-5, 1e-9, 1e-9  # competitor RT ~14 h
    short, long_ = 1800.0, 86400.0 * 3
    truth = apparent_ic50(short, L, k1, k2, k3, k4) / apparent_ic50(long_, L, k1, k2, k3, k4)
    dose = np.tile(np.geomspace(1e-11, 1e-5, 13), 2)
    inc = np.repeat([short, long_], 13)
    y = 100 * eq.motulsky_mahan(inc, L, k1, k2, dose, k3, k4) / eq.motulsky_mahan(inc, L, k1, k2, 0.0, k3, k4)
    y = y + rng(31).normal(0, 1.5, y.size)
    r = fit_ki_shift(dose, y, inc, tracer_conc=L, tracer_kd=kd)
    assert truth > 3
    assert_recovered(r, "ki_shift_ratio", truth, 0.10)
    # at equilibrium Ki = IC50/(1 + L/Kd) recovers k4/k3 (Cheng & Prusoff 1973, Biochem Pharmacol 22:3099)
    assert r.estimates["ki"] == pytest.approx(k4 / k3, rel=0.10)
    assert "not-at-equilibrium" in r.warning_codes


def test_ki_shift_of_a_fast_binder_is_one_within_its_interval():
    dose = np.tile(np.geomspace(1e-11, 1e-5, 13), 2)
    inc = np.repeat([1800.0, 14400.0], 13)
    y = eq.logistic4(dose, 0, 100, 2e-8, 1.0) + rng(37).normal(0, 2, dose.size)
    r = fit_ki_shift(dose, y, inc)
    lo, hi = r.ci95["ki_shift_ratio"]
    assert lo < 1 < hi and r.estimates["ki_shift_ratio"] == pytest.approx(1, rel=0.15)
    assert "not-at-equilibrium" not in r.warning_codes


# ------------------------------------------------------------ insurmountability
def test_insurmountability_recovers_the_fraction_of_maximal_response_left():
    dose = np.tile(np.geomspace(1e-10, 1e-4, 13), 2)
    lab = np.repeat(["control", "antagonist 10 nM"], 13)
    y = np.where(lab == "control", eq.agonist_response(dose, 5, 100, 1e-8, 1.0), eq.agonist_response(dose, 5, 43, 3e-8, 1.0))
    y = y + rng(41).normal(0, 2, y.size)
    r = fit_insurmountability(dose, y, lab)
    assert_recovered(r, "max_response_fraction", (43 - 5) / (100 - 5), 0.10)
    assert "insurmountable" in r.warning_codes


def test_a_small_but_significant_depression_is_not_called_insurmountable():
    dose = np.tile(np.geomspace(1e-10, 1e-4, 13), 2)
    lab = np.repeat(["control", "antagonist"], 13)
    y = np.where(lab == "control", eq.agonist_response(dose, 0, 100, 1e-8, 1.0), eq.agonist_response(dose, 0, 95, 1e-7, 1.0))
    r = fit_insurmountability(dose, y + rng(59).normal(0, 0.5, y.size), lab)
    assert r.ci95["max_response_fraction"][1] < 1.0
    assert "emax-slightly-depressed" in r.warning_codes and "insurmountable" not in r.warning_codes


def test_a_surmountable_shift_keeps_the_full_maximal_response():
    dose = np.tile(np.geomspace(1e-10, 1e-3, 15), 2)
    lab = np.repeat(["control", "antagonist"], 15)
    y = np.where(lab == "control", eq.agonist_response(dose, 0, 100, 1e-8, 1.0), eq.agonist_response(dose, 0, 100, 1e-6, 1.0))
    r = fit_insurmountability(dose, y + rng(43).normal(0, 2, y.size), lab)
    assert_recovered(r, "max_response_fraction", 1.0, 0.10)
    assert r.estimates["dose_ratio[antagonist]"] == pytest.approx(100, rel=0.25)  # Schild: a pure shift
    assert "insurmountable" not in r.warning_codes


# ------------------------------------------------------------ intervals
def test_profile_and_covariance_intervals_agree_when_koff_is_well_determined():
    t = np.linspace(0, 3600, 40)
    y = eq.one_phase_decay(t, 1e-3, 1000.0, 50.0) + rng(47).normal(0, 10, t.size)
    cov = fit_dissociation(t, y, intervals="covariance", check_biphasic=False)
    prof = fit_dissociation(t, y, intervals="profile", check_biphasic=False)
    assert cov.ci_kinds["koff"] == "covariance" and prof.ci_kinds["koff"] == "profile"
    np.testing.assert_allclose(prof.ci95["koff"], cov.ci95["koff"], rtol=0.02)


def test_a_koff_stuck_at_its_fitting_limit_gets_an_open_profile_interval():
    t = np.linspace(0, 3600, 30)
    y = 1000 + rng(53).normal(0, 10, t.size) + 0.002 * t  # no decay at all
    r = fit_dissociation(t, y)
    assert r.ci_kind == "profile"
    assert {"at-limit", "ci-open", "rt-lower-bound"} <= set(r.warning_codes)
    assert r.ci95["koff"][0] == 0.0 and np.isfinite(r.ci95["koff"][1])


def test_a_fit_that_cannot_converge_is_refused_with_a_fit_error():
    t = np.linspace(0, 3600, 40)
    y = eq.one_phase_decay(t, 1e-3, 1000.0, 50.0) + rng().normal(0, 10, t.size)
    with pytest.raises(FitError, match="did not converge"):
        fit_dissociation(t, y, max_nfev=1)
    loose = fit_dissociation(t, y, max_nfev=1, strict=False, check_biphasic=False)
    assert loose.success is False and "not-converged" in loose.warning_codes
