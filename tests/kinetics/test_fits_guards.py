"""Each fit method refuses data that belong to another method, with a one-line error naming the likely one.

Traces are generated from the closed forms (sources beside each) with seeded noise; the direction test is
Spearman's rank correlation (scipy.stats.spearmanr), independent of the fitted model.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracker.errors import FitError
from tracker.kinetics import equations as eq
from tracker.kinetics import (
    fit_association,
    fit_competition_kinetics,
    fit_dissociation,
    fit_insurmountability,
    fit_jump_dilution,
    fit_ki_shift,
    fit_morrison,
    fit_table,
    fit_washout_recovery,
)

T = np.linspace(0, 3600, 40)


def noise(seed, n, sd):
    return np.random.default_rng(seed).normal(0, sd, n)


def one_line(exc: pytest.ExceptionInfo[FitError]) -> str:
    msg = str(exc.value)
    assert "\n" not in msg
    return msg


def test_a_rising_trace_is_refused_by_dissociation_naming_association():
    # a binding onset: B = Bmax*L/(L+KD)*(1 - exp(-kobs*t)) (pseudo-first-order association; common practice)
    y = eq.association(T, 1e-9, 1e6, 1e-3, 1000.0) + noise(1, T.size, 10)
    with pytest.raises(FitError) as exc:
        fit_dissociation(T, y)
    msg = one_line(exc)
    assert "rises" in msg and "association" in msg and "%" not in msg


def test_one_rising_replicate_is_enough_to_refuse_a_dissociation():
    y = np.r_[eq.dissociation(T, 1e-3, 1000, 50), eq.association(T, 1e-9, 1e6, 1e-3, 1000)] + noise(2, 80, 10)
    with pytest.raises(FitError, match="curve 'b' rises"):
        fit_dissociation(np.r_[T, T], y, np.repeat(["a", "b"], 40))


def test_a_falling_trace_is_refused_by_association_naming_dissociation():
    # B = B0*exp(-koff*t) + NSB (Copeland, Pompliano & Meek 2006, Nat Rev Drug Discov 5:730)
    y = eq.dissociation(T, 1e-3, 1000.0, 50.0) + noise(3, T.size, 10)
    with pytest.raises(FitError) as exc:
        fit_association(T, y, np.full(T.size, 1e-9), koff=1e-3)
    assert "falls" in one_line(exc) and "dissociation" in one_line(exc)


def test_flat_association_data_are_refused_as_having_no_onset():
    y = 500.0 + noise(4, T.size, 10)
    with pytest.raises(FitError, match="no curve rises"):
        fit_association(T, y, np.full(T.size, 1e-9))


def test_a_slowing_progress_curve_is_refused_by_jump_dilution_as_onset_of_inhibition():
    # onset of slow-binding inhibition: P = vs*t + (vi - vs)*(1 - exp(-kobs*t))/kobs with vi > vs
    # (Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery; from memory)
    t = np.linspace(0, 7200, 60)
    onset = eq.jump_dilution_progress(t, 2.0, 0.1, 1e-3) + noise(5, t.size, 5)
    control = 2.0 * t + noise(6, t.size, 5)
    with pytest.raises(FitError, match="onset of inhibition"):
        fit_jump_dilution(np.r_[t, t], np.r_[control, onset], np.repeat(["control", "cpd"], t.size))


def test_falling_product_is_refused_by_jump_dilution():
    t = np.linspace(0, 7200, 60)
    with pytest.raises(FitError, match="falls with time.*dissociation"):
        fit_jump_dilution(t, 5000 - 0.5 * t + noise(7, t.size, 20))


def test_a_response_running_down_after_washout_is_refused():
    t = np.linspace(0, 7200, 40)
    falling = eq.washout_recovery(t, 100.0, -0.8, 5e-4) + noise(8, t.size, 1)  # starts above Rmax and decays
    with pytest.raises(FitError, match="falls after the washout"):
        fit_washout_recovery(t, falling)


def test_competition_kinetics_refuses_pre_bound_tracer_falling_from_the_first_reading():
    t = np.linspace(0, 3600, 30)
    conc = np.repeat([1e-8, 1e-7], 30)
    y = eq.dissociation(np.r_[t, t], np.repeat([1e-3, 2e-3], 30), 1000.0, 20.0) + noise(9, 60, 5)
    with pytest.raises(FitError, match="added together.*dissociation"):
        fit_competition_kinetics(np.r_[t, t], y, conc, tracer_kon=1e7, tracer_koff=1e-2, tracer_conc=1e-9)


def test_ki_shift_refuses_an_incubation_without_concentration_response():
    dose = np.tile(np.geomspace(1e-10, 1e-5, 11), 2)
    y = np.r_[eq.logistic4(dose[:11], 0, 100, 1e-8, 1.0), 50 + noise(10, 11, 2)] + noise(11, 22, 1)
    with pytest.raises(FitError, match="no concentration-response at incubation"):
        fit_ki_shift(dose, y, np.repeat([600.0, 7200.0], 11))


def test_insurmountability_refuses_a_falling_control_as_an_inhibition_curve():
    dose = np.tile(np.geomspace(1e-10, 1e-5, 10), 2)
    lab = np.repeat(["control", "antagonist"], 10)
    y = eq.logistic4(dose, 0, 100, 1e-8, 1.0) + noise(12, 20, 1)  # falls with dose
    with pytest.raises(FitError, match="falls with dose.*ki-shift or morrison"):
        fit_insurmountability(dose, y, lab)


def test_morrison_refuses_activity_that_rises_with_inhibitor():
    x = np.geomspace(1e-11, 1e-6, 12)
    with pytest.raises(FitError, match="rises with inhibitor"):
        fit_morrison(x, eq.agonist_response(x, 0, 100, 1e-8, 1.0) + noise(13, 12, 1), 1e-9)


def test_fit_table_passes_the_guard_through_for_any_method():
    import pandas as pd

    df = pd.DataFrame({"time": T, "signal": eq.association(T, 1e-9, 1e6, 1e-3, 1000.0) + noise(14, T.size, 10)})
    with pytest.raises(FitError, match="association"):
        fit_table("dissociation", df)


def test_a_genuine_small_dissociation_never_reports_a_negative_percentage():
    # 10% dissociated in the window: a lower bound, and no message quotes a negative share
    y = eq.dissociation(T, 3e-5, 1000.0, 0.0) + noise(15, T.size, 5)
    r = fit_dissociation(T, y)
    assert "rt-lower-bound" in r.warning_codes
    assert not any("-" in m.split("%")[0][-5:] for _, m in r.warnings if "%" in m)
