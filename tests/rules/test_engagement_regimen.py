"""duration-mismatch with target turnover and dosing regimens; one engagement function for the grader and the pages.

References:
- computed: scipy solve_ivp LSODA rtol 1e-10 (atol 1e-14) of the turnover model written out below
  (free and bound target as fractions of the drug-free level, both degraded at kdeg) and of the
  periodic steady state by shooting on the affine interval map;
- iv bolus superposition at steady state, C(t) = C0 e^-ke t/(1 - e^-ke tau) (textbook PK, Rowland & Tozer);
- residence time prolongs engagement only while dissociation is the slowest loss (Dahl & Akerud 2013,
  Drug Discov Today 18:697-707; Tonge 2018, ACS Chem Neurosci 9:29-39).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

from tracker.rules.checks import check_duration_mismatch
from tracker.rules.engagement import compound_engagement, dosing_interval, duration_set_by, regimen_engagement, regimen_label

H = 3600.0
NM = 1e-9
NAN = math.nan
LN2 = math.log(2)


def frame(rt_s, **over) -> pd.DataFrame:
    """A once-daily program (threshold 50%), iv bolus C0 3 nM, t1/2 4 h; KD 1 pM-ish slow binder by default."""
    koff = 1 / rt_s
    row = dict(compound_id=7, stage="candidate", intended_profile="once-daily", engagement_threshold=0.5, onset_max_s=NAN,
               duration_min_s=NAN, offset_max_s=NAN, dosing_interval_s=24 * H, target_half_life_s=NAN,
               kon_per_M_s=1e6, koff_per_s=koff, koff_low_per_s=NAN, koff_high_per_s=NAN, kd_source="measured", route="iv",
               free_cmax_M=3 * NM, tmax_s=NAN, half_life_s=4 * H, species="dog", pk_id=8, kinetic_measurement_id=9)
    row.update(over)
    return pd.DataFrame([row])


def steady_trough_reference(kon, koff, c0, hl, tau, target_hl):
    """Steady-state trough of the turnover model, iv bolus every tau (computed: solve_ivp LSODA rtol 1e-10)."""
    ke, kdeg = LN2 / hl, LN2 / target_hl

    def rhs(t, y):
        c = c0 * math.exp(-ke * t) / -math.expm1(-ke * tau)
        r, b = y
        return [kdeg * (1 - r) - kon * c * r + koff * b, kon * c * r - (koff + kdeg) * b]

    def end(y0):
        return solve_ivp(rhs, (0, tau), y0, method="LSODA", rtol=1e-10, atol=1e-14).y[:, -1]

    q = end([0.0, 0.0])
    p = np.column_stack([end([1.0, 0.0]) - q, end([0.0, 1.0]) - q])
    fixed = np.linalg.solve(np.eye(2) - p, q)
    sol = solve_ivp(rhs, (0, tau), fixed, method="LSODA", rtol=1e-10, atol=1e-14, dense_output=True)
    grid = np.linspace(0, tau, 20001)
    y = sol.sol(grid)
    return float((y[1] / (y[0] + y[1])).min())


def test_a_very_slow_dissociator_on_a_fast_turning_target_fails_once_daily_and_the_finding_names_turnover():
    # RT 7 days on a target with a 2 h half-life: without turnover the q24h trough is 98 %; with it
    # resynthesis pulls the trough to 40 % (computed: solve_ivp LSODA rtol 1e-10)
    stable = check_duration_mismatch(frame(7 * 24 * H))
    assert stable.empty  # no turnover known: the trough holds
    f = check_duration_mismatch(frame(7 * 24 * H, target_half_life_s=2 * H))
    assert len(f) == 1
    d = f.iloc[0]["data"]
    assert d["limit"] == "dosing_interval"
    ref = steady_trough_reference(1e6, 1 / (7 * 24 * H), 3 * NM, 4 * H, 24 * H, 2 * H)
    assert d["trough_occupancy"] == pytest.approx(ref, rel=1e-4)
    assert d["trough_occupancy"] < 0.5
    msg = f.iloc[0]["message"]
    assert "target turnover (t½ 2 h), not dissociation (RT 7 d), sets the duration" in msg
    assert "steady state on a 24 h dosing interval" in msg and "target t½ 2 h" in msg
    assert d["duration_set_by"] == "turnover" and d["regimen"] == "steady state" and d["target_half_life_s"] == 2 * H
    assert d["dosing_interval_s"] == 24 * H


def test_when_dissociation_is_faster_than_turnover_the_finding_does_not_blame_turnover():
    # RT 2 h < target half-life 30 h: dissociation sets the duration; the turnover wording stays silent
    f = check_duration_mismatch(frame(2 * H, target_half_life_s=30 * H, kon_per_M_s=1e5))
    assert len(f) == 1
    assert "turnover" not in f.iloc[0]["message"]
    assert f.iloc[0]["data"]["duration_set_by"] == "dissociation"


def test_without_a_dosing_interval_one_dose_is_judged_and_the_finding_says_so():
    f = check_duration_mismatch(frame(7 * 24 * H, dosing_interval_s=NAN, duration_min_s=200 * H, target_half_life_s=2 * H))
    assert len(f) == 1
    d = f.iloc[0]["data"]
    assert d["limit"] == "duration_min" and d["regimen"] == "single dose"
    assert "(one dose)" in f.iloc[0]["message"] and "after one dose" in f.iloc[0]["message"]
    assert d.get("trough_occupancy") is None  # no steady state for one dose


def test_a_regimen_is_judged_at_steady_state_not_on_one_dose():
    # iv q24h, t1/2 4 h, fast binder (RT 5 min, KD 1 nM), threshold 50 %: per interval at steady state
    # occupancy is above 50 % while C >= KD: C0/(1 - e^-ke tau) e^-ke t >= 1 nM, so the time above per interval
    # is ln(C0 R / KD)/ke (rapid equilibrium; iv superposition, textbook PK), give or take the binding
    # lag (1/kobs <= RT/2 = 150 s at the threshold, at each end).
    kon, koff = 1 / (5 * 60) / NM, 1 / (5 * 60)
    ke, tau, c0 = LN2 / (4 * H), 24 * H, 3 * NM
    acc = 1 / -math.expm1(-ke * tau)
    expected = math.log(c0 * acc / NM) / ke
    f = check_duration_mismatch(frame(5 * 60, kon_per_M_s=kon, duration_min_s=12 * H))
    d = f.iloc[0]["data"]
    assert d["limit"] == "duration_min" and d["regimen"] == "steady state"
    assert abs(d["duration_above_threshold_s"] - expected) < 300
    assert "per 24 h interval at steady state" in f.iloc[0]["message"]
    m = regimen_engagement(kon, koff, "iv", c0, NAN, 4 * H, 0.5, tau)
    assert m["duration_above_threshold_s"][0] == d["duration_above_threshold_s"]


def test_the_offset_of_a_regimen_is_counted_from_the_last_dose_at_steady_state():
    # PK t1/2 24 h dosed every 24 h accumulates twofold (R = 1/(1 - e^-ke tau), textbook PK): the offset after
    # the last dose at steady state is much later than after one dose
    one = regimen_engagement(1e6, 1 / (30 * H), "iv", 3 * NM, NAN, 24 * H, 0.5, NAN)
    reg = regimen_engagement(1e6, 1 / (30 * H), "iv", 3 * NM, NAN, 24 * H, 0.5, 24 * H)
    assert reg["offset_s"][0] > one["offset_s"][0] + 12 * H
    f = check_duration_mismatch(frame(30 * H, half_life_s=24 * H, offset_max_s=one["offset_s"][0] * 1.05))
    assert [d["limit"] for d in f["data"]] == ["offset_max"]
    assert "after the last dose" in f.iloc[0]["message"]


def test_the_pages_get_the_regimen_and_the_numbers_the_finding_used():
    f = check_duration_mismatch(frame(7 * 24 * H, target_half_life_s=2 * H)).iloc[0]["data"]
    ce = compound_engagement(1e6, 1 / (7 * 24 * H), {"route": "iv", "free_cmax_M": 3 * NM, "half_life_s": 4 * H},
                             {"engagement_threshold": 0.5, "dosing_interval_s": 24 * H, "target_half_life_s": 2 * H})
    assert ce["regimen"] == "steady state on a 24 h dosing interval"
    for k in ("trough_occupancy", "offset_s", "duration_above_threshold_s", "peak_occupancy", "onset_s"):
        assert ce[k] == pytest.approx(f[k], rel=1e-12), k
    ts = ce["timeseries"]
    first = ts["t_s"] <= 24 * H
    assert ts["occupancy"][first].min() == pytest.approx(ce["trough_occupancy"], rel=1e-3)
    assert ce["duration_set_by"] == "turnover"


def test_the_program_interval_wins_over_the_pk_study_and_labels_read_plainly():
    assert dosing_interval(12 * H, 24 * H) == 12 * H
    assert dosing_interval(NAN, 24 * H) == 24 * H
    assert math.isnan(dosing_interval(NAN, NAN))
    assert regimen_label(NAN) == "one dose"
    assert regimen_label(8 * H) == "steady state on a 8 h dosing interval"
    assert duration_set_by(1 / (10 * H), 5 * H) == "turnover"
    assert duration_set_by(1 / (10 * H), 20 * H) == "dissociation"
    assert duration_set_by(1 / (10 * H), 5 * H, 0.0) == "dissociation"  # bound target not degraded
    assert duration_set_by(1 / (10 * H), NAN) is None


def test_the_evidence_module_summary_carries_the_judged_regimen_and_numbers():
    # tracker.rules.evidence.engagement_summary (what the pages read) uses the duration check's inputs and function
    from types import SimpleNamespace

    from tracker.rules.evidence import engagement_summary

    row = frame(7 * 24 * H, target_half_life_s=2 * H)
    f = check_duration_mismatch(row).iloc[0]["data"]
    s = engagement_summary(SimpleNamespace(duration=row), 7)
    assert s["regimen"] == "steady state on a 24 h dosing interval" and s["duration_set_by"] == "turnover"
    for k in ("trough_occupancy", "offset_s", "duration_above_threshold_s", "onset_s"):
        assert s["metrics"][k] == pytest.approx(f[k], rel=1e-12), k
