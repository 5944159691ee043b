"""Each rule's check on plain DataFrames: fires on a positive case, silent on a near miss, across stages.

No database here.  External references are named beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from tracker.domain import STAGES
from tracker.rules.checks import (
    CAUTION_AFFINITY,
    CAUTION_OFFSET,
    FINDING_COLUMNS,
    check_affinity_underestimate,
    check_assay_floor,
    check_duration_mismatch,
    check_insurmountability,
    check_ki_shift,
    check_residence_time_unmeasured,
    ki_shift_outcome,
    predict_apparent,
    severity_from,
    suggest_assay,
)

NAN = math.nan
H = 3600.0
MIN = 60.0


def saturation_fold_reference(tau: float) -> float:
    """Fold x solving x/(1+x) (1 - exp(-tau (1+x))) = 1/2 with scipy brentq.

    The saturation-binding apparent KD after time t (occupancy L/(L+KD) (1 - exp(-(kon L + koff) t)),
    Hulme & Trevethick 2010, Br J Pharmacol 161:1219-1237, from memory), written in x = L/KD and tau = koff t.
    reference: scipy brentq, xtol 1e-14 (computed).
    """
    return brentq(lambda x: x / (1 + x) * -math.expm1(-tau * (1 + x)) - 0.5, 1.0, 1e9, xtol=1e-14, rtol=1e-14)


def potency(**over) -> pd.DataFrame:
    """One potency row of a compound with measured kinetics: KD 1 nM, RT 6 h, read after 1 h."""
    koff = 1 / (6 * H)
    row = dict(compound_id=1, stage="lead-optimization", potency_id=10, assay="bind", readout="KD", value_M=4.6e-9,
               incubation_s=1 * H, format="binding", tracer_conc_M=NAN, tracer_kd_M=NAN, tracer_residence_time_s=NAN,
               koff_per_s=koff, kon_per_M_s=koff / 1e-9, kd_M=1e-9, koff_low_per_s=NAN, koff_high_per_s=NAN,
               kinetic_measurement_id=5)
    row.update(over)
    return pd.DataFrame([row])


# ----------------------------------------------------------------------------- affinity-underestimate, RT known
def test_the_six_hour_residence_time_compound_reads_about_4_nM_after_one_hour():
    # common practice: RT 6 h, KD 1 nM, saturation binding -> apparent KD ~20 nM at 10 min, ~4 nM at 1 h,
    # correct only after ~12 h; the fold is also checked against an independent brentq solution (computed)
    f = check_affinity_underestimate(potency())
    assert len(f) == 1
    data = f.iloc[0]["data"]
    assert data["fold_shift"] == pytest.approx(saturation_fold_reference(1 / 6), rel=1e-9)
    assert 3.5 < data["fold_shift"] < 5.0
    assert data["corrected_affinity_M"] == pytest.approx(4.6e-9 / data["fold_shift"], rel=1e-12)
    ten_min = predict_apparent(potency(incubation_s=10 * MIN))["fold_shift"].iloc[0]
    assert 15 < ten_min < 30  # "about 20 nM": within ~30% of the stated value
    # minimum incubation, saturation closed form t = RT ln(2x/(x-1))/(1+x) at x = 1.25 (computed from the formula)
    assert data["min_incubation_s"] == pytest.approx(6 * H * math.log(10) / 2.25, rel=1e-9)
    assert data["rule_of_thumb_incubation_s"] == pytest.approx(12 * H)  # common practice: >= 2 x RT
    assert data["recommended_incubation_s"] == pytest.approx(data["min_incubation_s"])  # one recommendation: the format-aware minimum


def test_the_finding_gives_the_shift_the_corrected_affinity_and_the_minimum_incubation_in_readable_units():
    f = check_affinity_underestimate(potency()).iloc[0]
    assert f["rule"] == "affinity-underestimate"
    assert "4.62×" in f["message"] and "6 h" in f["message"] and "4.6 nM" in f["message"] and "60 min" in f["message"]
    # one recommendation: the format-aware minimum, 6 h x ln(10)/2.25 = 6.14 h (saturation closed form, computed)
    assert "6.14 h" in f["prompt"] and f["prompt"].startswith("Re-run bind with ≥")
    assert f["caution"] == CAUTION_AFFINITY and "mechanism-based toxicity" in f["caution"]
    assert "not dosing advice" in f["caution"]
    assert set(FINDING_COLUMNS) <= set(f.index)


@pytest.mark.parametrize(
    "stage, expected",
    [("hit", "low"), ("hit-to-lead", "low"), ("lead-optimization", "moderate"), ("advanced-lead", "moderate"),
     ("candidate", "high"), ("clinical", "high")],
)
def test_a_fourfold_shift_grows_in_severity_with_the_stage(stage, expected):
    assert check_affinity_underestimate(potency(stage=stage)).iloc[0]["severity"] == expected


@pytest.mark.parametrize("stage, expected", [("hit", "moderate"), ("lead-optimization", "high"), ("candidate", "high")])
def test_the_48_hour_compound_reads_about_30_fold_too_weak_and_is_graded_by_the_size_of_the_shift(stage, expected):
    # common practice: a 48 h RT compound with KD 23 pM shows ~690 pM after 1 h, ~30-fold too weak
    koff = 1 / (48 * H)
    f = check_affinity_underestimate(potency(stage=stage, value_M=690e-12, koff_per_s=koff, kon_per_M_s=koff / 23e-12, kd_M=23e-12))
    data = f.iloc[0]["data"]
    assert 25 < data["fold_shift"] < 35
    assert data["corrected_affinity_M"] == pytest.approx(23e-12, rel=0.2)
    assert f.iloc[0]["severity"] == expected


@pytest.mark.parametrize("stage", STAGES)
def test_the_11_minute_compound_reads_correctly_after_one_hour_and_stays_silent(stage):
    # common practice: an 11 min RT compound with KD 12 nM reads correctly at 1 h
    koff = 1 / (11 * MIN)
    f = check_affinity_underestimate(potency(stage=stage, value_M=12e-9, koff_per_s=koff, kon_per_M_s=koff / 12e-9, kd_M=12e-9))
    assert f.empty


def test_a_shift_just_above_the_tolerance_fires_and_just_below_stays_silent():
    koff = 1 / (6 * H)
    # incubation giving fold 1.30 and 1.20 (solved with brentq on the reference fold: computed)
    t_130 = brentq(lambda t: saturation_fold_reference(koff * t) - 1.30, 60, 100 * H)
    t_120 = brentq(lambda t: saturation_fold_reference(koff * t) - 1.20, 60, 100 * H)
    assert t_130 < t_120 < 2 * 6 * H
    fires = check_affinity_underestimate(potency(incubation_s=t_130, stage="candidate"))
    silent = check_affinity_underestimate(potency(incubation_s=t_120, stage="candidate"))
    assert len(fires) == 1 and fires.iloc[0]["severity"] == "moderate"  # weak shift at candidate
    assert silent.empty


def test_a_reading_past_twice_the_residence_time_still_fires_when_its_fold_is_outside_the_tolerance():
    # the rule judges the predicted fold, not the 2 x RT rule of thumb: at 2.05 x RT the fold is just above 1.01
    # (checked against the brentq reference of the saturation read), so a 1.01-fold tolerance fires and 1.25 does not
    row = potency(incubation_s=2.05 * 6 * H)
    fold = predict_apparent(row)["fold_shift"].iloc[0]
    assert fold == pytest.approx(saturation_fold_reference(2.05), rel=1e-9) and 1.01 < fold < 1.25
    assert len(check_affinity_underestimate(row, fold_tolerance=1.01)) == 1
    assert check_affinity_underestimate(row).empty


def test_per_row_thresholds_apply_to_their_own_rows():
    rows = pd.concat([potency(potency_id=1), potency(potency_id=2)], ignore_index=True)
    f = check_affinity_underestimate(rows, fold_tolerance=np.array([1.25, 6.0]), fold_moderate=np.array([3.0, 6.0]))
    assert [d["potency_id"] for d in f["data"]] == [1]


def test_the_fold_interval_comes_from_the_koff_interval():
    koff = 1 / (6 * H)
    f = check_affinity_underestimate(potency(koff_low_per_s=koff / 2, koff_high_per_s=koff * 2)).iloc[0]
    lo, hi = f["data"]["fold_shift_ci95"]
    assert lo == pytest.approx(saturation_fold_reference(2 * koff * H), rel=1e-9)
    assert hi == pytest.approx(saturation_fold_reference(koff / 2 * H), rel=1e-9)
    assert lo < f["data"]["fold_shift"] < hi
    assert "95% interval" in f["message"]


def test_enzyme_and_functional_formats_say_they_are_approximated_as_a_one_step_binding_read():
    for fmt in ("enzyme", "functional"):
        f = check_affinity_underestimate(potency(format=fmt, readout="IC50")).iloc[0]
        assert "approximated as a one-step binding read" in f["message"]
        assert f["data"]["simulated_as"] == "saturation"
    f = check_affinity_underestimate(potency(format="competition-binding", readout="Ki")).iloc[0]
    assert "tracer not fully described" in f["message"]


def test_a_described_tracer_competition_is_simulated_as_competition_and_matches_the_fast_tracer_limit():
    # With a tracer far faster than the compound, the Cheng-Prusoff Ki after t equals the saturation
    # apparent KD (Motulsky & Mahan 1984, Mol Pharmacol 25:1-9; Cheng & Prusoff 1973, Biochem Pharmacol 22:3099)
    fast = potency(format="competition-binding", readout="Ki", tracer_conc_M=0.1e-9, tracer_kd_M=1e-9, tracer_residence_time_s=1.0)
    p = predict_apparent(fast).iloc[0]
    assert p["simulated_as"] == "competition"
    assert p["fold_shift"] == pytest.approx(saturation_fold_reference(1 / 6), rel=0.03)
    slow_tracer = potency(format="competition-binding", readout="Ki", tracer_conc_M=1e-9, tracer_kd_M=1e-9, tracer_residence_time_s=2 * H)
    assert predict_apparent(slow_tracer).iloc[0]["fold_shift"] != pytest.approx(p["fold_shift"], rel=0.03)


def test_a_residence_time_lower_bound_is_worded_as_at_least():
    f = check_affinity_underestimate(potency(rt_lower_bound=True)).iloc[0]
    assert "at least" in f["message"] and "≥ 6 h" in f["message"]


# ----------------------------------------------------------------------------- Ki shift
def pairs(ratio, stage="lead-optimization", **over) -> pd.DataFrame:
    row = dict(compound_id=3, stage=stage, assay="bind", ratio=ratio, incubation_short_s=0.5 * H, incubation_long_s=16 * H,
               value_long_M=1e-9, source="potency", potency_ids=[4, 5])
    row.update(over)
    return pd.DataFrame([row])


@pytest.mark.parametrize("t_short, t_long", [(30 * MIN, 3 * H), (1 * H, 4 * H), (15 * MIN, 1 * H)])
def test_a_slow_binder_shift_fires_for_pairs_whose_largest_possible_shift_is_below_six(t_short, t_long):
    # a one-step binder shifts by at most t_long/t_short (6x, 4x, 4x here), so a fixed "> 6x" threshold is blind;
    # the shift of an RT-10 h compound between the two reads is computed with the brentq reference of the
    # saturation fold (Ki(t)/Ki = x(koff t), fast tracer; Hulme & Trevethick 2010, from memory)
    rt = 10 * H
    ratio = saturation_fold_reference(t_short / rt) / saturation_fold_reference(t_long / rt)
    assert 2.5 < ratio <= t_long / t_short <= 6
    f = check_ki_shift(pairs(ratio, incubation_short_s=t_short, incubation_long_s=t_long, value_long_M=1e-10))
    assert len(f) == 1
    data = f.iloc[0]["data"]
    assert data["max_shift_for_pair"] == pytest.approx(t_long / t_short)
    # the implied residence-time interval contains the true 10 h
    assert data["residence_time_low_s"] <= rt <= data.get("residence_time_high_s", math.inf)


def test_a_ratio_within_replicate_scatter_stays_silent():
    assert check_ki_shift(pairs(1.4)).empty
    assert len(check_ki_shift(pairs(1.6))) == 1


@pytest.mark.parametrize(
    "ratio, stage, expected",
    [(7, "hit", "low"), (12, "hit", "moderate"), (7, "lead-optimization", "moderate"), (50, "lead-optimization", "moderate"),
     (50, "advanced-lead", "moderate"), (7, "candidate", "high"), (7, "clinical", "high")],
)
def test_inferred_ki_shift_findings_are_at_most_moderate_before_candidate(ratio, stage, expected):
    f = check_ki_shift(pairs(ratio, stage)).iloc[0]
    assert f["severity"] == expected
    assert f["data"]["likely"] is True and f["message"].startswith("likely underestimated")


def test_the_ki_shift_finding_gives_the_residence_time_interval_consistent_with_it():
    f = check_ki_shift(pairs(8.0, value_long_M=20e-12)).iloc[0]
    lo, hi = f["data"]["residence_time_low_s"], f["data"].get("residence_time_high_s", math.inf)
    assert 0 < lo < hi
    # a shift of 8 between 30 min and 16 h needs RT well above the short incubation: the saturation fold at
    # t_short must be at least 8 (computed with the brentq reference)
    assert saturation_fold_reference(0.5 * H / lo) >= 8 / 1.5 * 0.99
    assert "the evidence implies residence time" in f["message"]
    assert f["data"]["potency_ids"] == [4, 5]


def test_a_ki_shift_at_odds_with_the_plausible_kon_range_reports_the_interval_from_the_shift_alone():
    # KD ~1 nM with RT > 3.5 h would need kon < 1e5 /M/s, below the plausible range (from memory: 1e5-1e8)
    f = check_ki_shift(pairs(8.0, value_long_M=1e-9)).iloc[0]
    assert f["data"]["residence_time_low_s"] > 0.5 * H
    # strongly slow binding: said as a kon below the assumed range, never as "inconsistent"
    assert "the shift alone implies residence time" in f["message"] and "kon below 1e5 /M/s" in f["message"]
    assert f["data"]["rt_bounds_verdict"] == "kon-below-range" and "inconsistent" not in f["message"]


def test_a_fitted_ki_shift_carries_its_interval_into_the_message():
    f = check_ki_shift(pairs(7.3, ratio_low=5.6, ratio_high=9.5, source="fit", assay="a saved Ki-shift fit")).iloc[0]
    assert "(95% interval 5.6×–9.5×)" in f["message"]
    assert f["data"]["ki_shift_ratio_ci95"] == [5.6, 9.5]


def test_ki_shift_outcomes_split_at_the_no_shift_ratio_and_the_threshold():
    out = ki_shift_outcome([1.0, 1.49, 1.5, 6.0, 6.01])
    assert list(out) == ["no-shift", "no-shift", "inconclusive", "shift", "shift"]


def test_a_pair_too_close_in_time_to_show_a_shift_is_never_read_as_no_shift():
    # 1 h vs 1 h 10 min can shift by at most 1.17x, inside the 1.5-fold scatter: inconclusive, not "no shift"
    out = ki_shift_outcome([1.1, 1.1], short_incubation=[H, H], long_incubation=[70 * MIN, 16 * H])
    assert list(out) == ["inconclusive", "no-shift"]


# ----------------------------------------------------------------------------- insurmountability
def insurmountable(fraction, stage="lead-optimization", **over) -> pd.DataFrame:
    row = dict(compound_id=4, stage=stage, assay="calcium", max_response_fraction=fraction, potency_id=9, source="potency")
    row.update(over)
    return pd.DataFrame([row])


def test_an_insurmountable_curve_fires_and_a_surmountable_one_stays_silent():
    assert len(check_insurmountability(insurmountable(0.75))) == 1
    assert check_insurmountability(insurmountable(0.82)).empty
    assert check_insurmountability(insurmountable(0.95)).empty


@pytest.mark.parametrize(
    "fraction, stage, expected",
    [(0.7, "hit-to-lead", "low"), (0.4, "hit-to-lead", "moderate"), (0.7, "lead-optimization", "moderate"),
     (0.2, "advanced-lead", "moderate"), (0.7, "candidate", "high")],
)
def test_insurmountability_severity_grows_with_depth_and_stage_and_is_capped_before_candidate(fraction, stage, expected):
    f = check_insurmountability(insurmountable(fraction, stage)).iloc[0]
    assert f["severity"] == expected
    assert "evidence, not proof" in f["message"] and f"{100 * fraction:.0f}%" in f["message"]


# ----------------------------------------------------------------------------- assay floor
def floor_row(value, **over) -> pd.DataFrame:
    row = dict(compound_id=5, stage="lead-optimization", potency_id=11, assay="bind", readout="KD", value_M=value,
               incubation_s=1 * H, format="binding", tracer_conc_M=NAN, tracer_kd_M=NAN, tracer_residence_time_s=NAN,
               kon_per_M_s=1e6, kon_source="assumed")
    row.update(over)
    return pd.DataFrame([row])


def test_a_potency_within_twice_the_assay_floor_fires_and_one_beyond_stays_silent():
    floor = math.log(2) / (1e6 * H)  # ln2/(kon t): an infinitely slow dissociator's apparent KD (common practice)
    f = check_assay_floor(floor_row(1.9 * floor))
    assert len(f) == 1
    assert f.iloc[0]["data"]["assay_floor_M"] == pytest.approx(floor, rel=1e-12)
    assert f.iloc[0]["severity"] == "low"  # a heuristic: evidence level 0
    assert check_assay_floor(floor_row(2.1 * floor)).empty


@pytest.mark.parametrize("stage, expected", [("hit", "low"), ("lead-optimization", "low"), ("candidate", "moderate")])
def test_the_floor_heuristic_is_weak_evidence_at_every_stage(stage, expected):
    floor = math.log(2) / (1e6 * H)
    assert check_assay_floor(floor_row(floor, stage=stage)).iloc[0]["severity"] == expected


def test_an_ic50_in_a_tracer_competition_is_compared_with_the_floor_times_one_plus_l_over_kd():
    tracer = dict(format="competition-binding", tracer_conc_M=2e-9, tracer_kd_M=1e-9, tracer_residence_time_s=60.0)
    ki_floor = check_assay_floor(floor_row(1e-12, readout="Ki", **tracer)).iloc[0]["data"]["assay_floor_M"]
    ic_floor = check_assay_floor(floor_row(1e-12, readout="IC50", **tracer)).iloc[0]["data"]["assay_floor_M"]
    # Cheng & Prusoff 1973: IC50 = Ki (1 + L/Kd)
    assert ic_floor == pytest.approx(ki_floor * 3.0, rel=1e-12)


# ----------------------------------------------------------------------------- residence-time-unmeasured
def compounds(stage, has_kinetics=False, evidence=None) -> pd.DataFrame:
    return pd.DataFrame([dict(compound_id=6, stage=stage, has_kinetics=has_kinetics, slow_evidence=evidence,
                              suggested_assay="jump dilution")])


@pytest.mark.parametrize("stage", ["advanced-lead", "candidate", "clinical"])
def test_an_advanced_compound_without_kinetics_is_high_and_with_kinetics_is_silent(stage):
    f = check_residence_time_unmeasured(compounds(stage))
    assert f.iloc[0]["severity"] == "high" and f.iloc[0]["rule"] == "residence-time-unmeasured"
    assert "jump dilution" in f.iloc[0]["prompt"] and "Measure residence time" in f.iloc[0]["prompt"]
    assert check_residence_time_unmeasured(compounds(stage, has_kinetics=True)).empty


def test_a_lead_optimization_compound_needs_evidence_of_slow_binding_and_is_then_moderate():
    f = check_residence_time_unmeasured(compounds("lead-optimization", evidence="Ki shift (8× in bind)"))
    assert f.iloc[0]["severity"] == "moderate" and "Ki shift" in f.iloc[0]["message"]
    assert check_residence_time_unmeasured(compounds("lead-optimization")).empty
    assert check_residence_time_unmeasured(compounds("lead-optimization", evidence="")).empty


@pytest.mark.parametrize("stage", ["hit", "hit-to-lead"])
def test_early_compounds_never_get_residence_time_unmeasured(stage):
    assert check_residence_time_unmeasured(compounds(stage, evidence="Ki shift (40× in bind)")).empty


# ----------------------------------------------------------------------------- duration-mismatch
def engagement(rt_s, stage="candidate", **over) -> pd.DataFrame:
    """A short-acting program (threshold 30%), iv bolus C0 10 nM, t1/2 2 h; compound KD 1 nM."""
    koff = 1 / rt_s
    row = dict(compound_id=7, stage=stage, intended_profile="short-acting", engagement_threshold=0.3, onset_max_s=NAN,
               duration_min_s=NAN, offset_max_s=9.5 * H, dosing_interval_s=NAN, kon_per_M_s=koff / 1e-9, koff_per_s=koff,
               koff_low_per_s=NAN, koff_high_per_s=NAN, kd_source="measured", route="iv", free_cmax_M=10e-9, tmax_s=NAN,
               half_life_s=2 * H, species="rat", pk_id=8, kinetic_measurement_id=9)
    row.update(over)
    return pd.DataFrame([row])


def rapid_offset(c0, kd, thr, half_life):
    """iv bolus C = C0 exp(-ke t) with rapid equilibrium C/(C+KD) (textbook PK; docs/REFERENCES.md §7)."""
    c_thr = kd * thr / (1 - thr)
    return math.log(c0 / c_thr) / (math.log(2) / half_life)


def test_a_fast_binder_stays_inside_the_short_acting_offset_limit_and_a_slow_binder_breaks_it():
    # common practice: a 5 min RT compound tracks PK; a 6 h RT compound of the same affinity stays engaged much longer
    expected = rapid_offset(10e-9, 1e-9, 0.3, 2 * H)  # 9.09 h
    fast = check_duration_mismatch(engagement(5 * MIN))
    assert fast.empty
    slow = check_duration_mismatch(engagement(6 * H))
    assert len(slow) == 1
    f = slow.iloc[0]
    assert f["data"]["limit"] == "offset_max" and f["severity"] == "high"
    assert f["data"]["offset_s"] > 1.4 * expected
    assert f["data"]["excess"] == pytest.approx(f["data"]["offset_s"] - 9.5 * H)
    assert "offset" in f["message"] and "exceeds the 9.5 h limit" in f["message"]
    assert f["caution"] == CAUTION_OFFSET and "next-day impairment" in f["caution"]


def test_the_fast_binder_offset_matches_the_rapid_equilibrium_pk_answer_and_a_tighter_limit_fires():
    expected = rapid_offset(10e-9, 1e-9, 0.3, 2 * H)
    f = check_duration_mismatch(engagement(5 * MIN, offset_max_s=expected * 0.97)).iloc[0]
    # binding lag of a 5 min RT compound adds minutes, not hours (computed bound 3%)
    assert f["data"]["offset_s"] == pytest.approx(expected, rel=0.03)
    assert f["data"]["offset_s"] > expected


@pytest.mark.parametrize("stage, expected", [("hit", "low"), ("lead-optimization", "moderate"), ("advanced-lead", "moderate"),
                                             ("candidate", "high"), ("clinical", "high")])
def test_a_failed_limit_is_high_from_candidate_on(stage, expected):
    assert check_duration_mismatch(engagement(6 * H, stage=stage)).iloc[0]["severity"] == expected


def test_a_slow_onset_is_named_with_its_excess():
    # kon 1e4 /M/s reaches 30% occupancy only after hours
    f = check_duration_mismatch(engagement(6 * H, kon_per_M_s=1e4, koff_per_s=1e-5, onset_max_s=30 * MIN, offset_max_s=NAN)).iloc[0]
    assert f["data"]["limit"] == "onset_max"
    assert f["data"]["onset_s"] > 30 * MIN and f["data"]["excess"] == pytest.approx(f["data"]["onset_s"] - 30 * MIN)
    assert check_duration_mismatch(engagement(6 * H, kon_per_M_s=1e4, koff_per_s=1e-5, onset_max_s=f["data"]["onset_s"] * 1.05,
                                              offset_max_s=NAN)).empty


def test_a_too_short_duration_and_a_lapsing_trough_fail_a_once_daily_profile():
    once_daily = dict(intended_profile="once-daily", engagement_threshold=0.5, offset_max_s=NAN)
    f = check_duration_mismatch(engagement(5 * MIN, duration_min_s=20 * H, **once_daily))
    assert list(f["data"].map(lambda d: d["limit"])) == ["duration_min"]
    assert "Model repeat dosing" in f.iloc[0]["prompt"]
    g = check_duration_mismatch(engagement(5 * MIN, dosing_interval_s=24 * H, **once_daily))
    assert list(g["data"].map(lambda d: d["limit"])) == ["dosing_interval"]
    assert g.iloc[0]["data"]["trough_occupancy"] < 0.5
    # a duration minimum shorter than the interval allows the gap: only the duration is checked
    h = check_duration_mismatch(engagement(5 * MIN, dosing_interval_s=24 * H, duration_min_s=6 * H, **once_daily))
    assert h.empty


def test_engagement_that_never_reaches_the_threshold_is_one_finding():
    f = check_duration_mismatch(engagement(5 * MIN, free_cmax_M=0.1e-9, onset_max_s=H))
    assert len(f) == 1 and f.iloc[0]["data"]["limit"] == "engagement_threshold"
    assert "never reaches the 30% threshold" in f.iloc[0]["message"]


def test_missing_pk_or_kinetics_at_candidate_is_said_and_earlier_stays_silent():
    f = check_duration_mismatch(engagement(6 * H, free_cmax_M=NAN, half_life_s=NAN, route=None))
    assert f.iloc[0]["severity"] == "moderate" and "PK profile" in f.iloc[0]["message"]
    g = check_duration_mismatch(engagement(6 * H, koff_per_s=NAN, kon_per_M_s=NAN, stage="clinical"))
    assert "kinetic measurement" in g.iloc[0]["message"]
    assert check_duration_mismatch(engagement(6 * H, free_cmax_M=NAN, stage="advanced-lead")).empty
    # a program without an intended profile: nothing to compare, even with PK missing
    assert check_duration_mismatch(engagement(6 * H, offset_max_s=NAN)).empty
    assert check_duration_mismatch(engagement(6 * H, offset_max_s=NAN, free_cmax_M=NAN)).empty


def test_the_koff_interval_becomes_an_interval_on_the_failing_metric():
    koff = 1 / (6 * H)
    f = check_duration_mismatch(engagement(6 * H, koff_low_per_s=koff / 2, koff_high_per_s=koff * 2)).iloc[0]
    lo, hi = f["data"]["simulated_value_ci95"]
    assert lo < f["data"]["offset_s"] < hi
    assert "95% interval" in f["message"]


def test_the_default_threshold_is_used_and_said_when_the_program_sets_none():
    f = check_duration_mismatch(engagement(6 * H, engagement_threshold=NAN)).iloc[0]
    assert f["data"]["engagement_threshold"] == 0.5 and "default; the program sets none" in f["message"]


def test_many_compounds_are_checked_in_one_call_with_and_without_a_dosing_interval():
    rows = pd.concat([engagement(6 * H, compound_id=i, dosing_interval_s=(24 * H if i % 2 else NAN)) for i in range(40)], ignore_index=True)
    f = check_duration_mismatch(rows)
    assert sorted(set(f["compound_id"])) == list(range(40))


# ----------------------------------------------------------------------------- helpers
def test_severity_combines_evidence_and_stage_and_caps_inferred_findings():
    stages = ["hit", "lead-optimization", "candidate"]
    assert list(severity_from([2, 2, 2], stages)) == ["moderate", "high", "high"]
    assert list(severity_from([2, 2, 2], stages, likely=True)) == ["moderate", "moderate", "high"]
    assert list(severity_from([0, 0, 0], stages)) == ["low", "low", "moderate"]


def test_the_suggested_assay_follows_the_assay_formats():
    assert "competition kinetics" in suggest_assay({"competition-binding"}, has_tracer=True)
    assert suggest_assay({"enzyme"}) == "jump dilution"
    assert "SPR" in suggest_assay({"binding"})
    assert "washout" in suggest_assay({"functional"})


def test_no_rows_give_an_empty_findings_frame_with_the_columns():
    for f in (check_affinity_underestimate(potency().iloc[:0]), check_ki_shift(pairs(9).iloc[:0]),
              check_insurmountability(insurmountable(0.1).iloc[:0]), check_assay_floor(floor_row(1e-12).iloc[:0]),
              check_residence_time_unmeasured(compounds("candidate").iloc[:0]), check_duration_mismatch(engagement(H).iloc[:0])):
        assert f.empty and list(f.columns) == FINDING_COLUMNS
