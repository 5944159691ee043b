"""The evidence model and the rules built on it, each against a reference outside the code under test.

References: scipy ``solve_ivp`` (LSODA, rtol 1e-10) of the two-ligand binding ODE and ``brentq`` root finding for
IC50s and equilibria (computed); the published equations named beside each check.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from tracker.kinetics.equations import munson_rodbard_ki, tracer_bound_free_ratio
from tracker.rules.checks import check_affinity_underestimate, check_assay_floor, check_tight_binding
from tracker.rules.evidence import predict_readings, select_kinetics, summarise

NAN = math.nan
H = 3600.0
MIN = 60.0


def reading(**over) -> pd.DataFrame:
    koff = 1 / (6 * H)
    row = dict(compound_id=1, stage="lead-optimization", potency_id=10, assay="bind", readout="KD", value_M=4.6e-9,
               incubation_s=1 * H, format="binding", tracer_conc_M=NAN, tracer_kd_M=NAN, tracer_residence_time_s=NAN,
               koff_per_s=koff, kon_per_M_s=koff / 1e-9, kd_M=1e-9, koff_low_per_s=NAN, koff_high_per_s=NAN,
               kinetic_measurement_id=5)
    row.update(over)
    return pd.DataFrame([row])


# ----------------------------------------------------------------------------- ODE references
def tracer_bound(t_read, L, k1, k2, I, k3, k4, t_pre=0.0):
    """Fractional tracer binding after t_read, competitor pre-incubated t_pre with the receptor (no depletion).

    dRL/dt = k1 L R - k2 RL, dRI/dt = k3 I R - k4 RI, R = 1 - RL - RI (Motulsky & Mahan 1984, Mol Pharmacol 25:1-9).
    reference: scipy solve_ivp LSODA rtol 1e-10 (computed).
    """
    def f(_, y, lig):
        rl, ri = y
        r = 1.0 - rl - ri
        return [k1 * lig * r - k2 * rl, k3 * I * r - k4 * ri]

    y0 = [0.0, 0.0]
    if t_pre > 0:
        y0 = list(solve_ivp(f, (0, t_pre), y0, args=(0.0,), method="LSODA", rtol=1e-10, atol=1e-14).y[:, -1])
    sol = solve_ivp(f, (0, t_read), y0, args=(L,), method="LSODA", rtol=1e-10, atol=1e-14)
    return sol.y[0, -1]


def ode_apparent_ki(t_read, L, kd_t, koff_t, kd, koff, t_pre=0.0):
    """Cheng-Prusoff Ki from the ODE IC50 (brentq on log I): Ki = IC50/(1 + L/Kd) (Cheng & Prusoff 1973)."""
    k1, k3 = koff_t / kd_t, koff / kd
    b0 = tracer_bound(t_read, L, k1, koff_t, 0.0, k3, koff)
    g = lambda li: tracer_bound(t_read, L, k1, koff_t, math.exp(li), k3, koff, t_pre) / b0 - 0.5  # noqa: E731
    ic50 = math.exp(brentq(g, math.log(kd) - 12, math.log(kd) + 12, xtol=1e-10))
    return ic50 / (1 + L / kd_t)


def test_a_slow_tracer_at_high_concentration_makes_a_fast_compound_read_too_potent_with_its_own_wording():
    # fast compound (RT 2 min, Ki 1 nM), slow tracer (RT 2 h, KD 1 nM) at 10 x KD, read after 30 min
    row = reading(format="competition-binding", readout="Ki", incubation_s=30 * MIN, tracer_conc_M=10e-9, tracer_kd_M=1e-9,
                  tracer_residence_time_s=2 * H, koff_per_s=1 / (2 * MIN), kon_per_M_s=1 / (2 * MIN) / 1e-9, kd_M=1e-9, value_M=0.2e-9)
    pred = predict_readings(row).iloc[0]
    ref = ode_apparent_ki(30 * MIN, 10e-9, 1e-9, 1 / (2 * H), 1e-9, 1 / (2 * MIN)) / 1e-9
    assert pred["fold_shift"] == pytest.approx(ref, rel=1e-4)
    assert pred["fold_shift"] < 0.5
    f = check_affinity_underestimate(row)
    assert list(f["rule"]) == ["affinity-overestimate"]
    assert "too potent" in f.iloc[0]["message"] and "tracer" in f.iloc[0]["message"]
    assert "lower target coverage" in f.iloc[0]["caution"] and "not dosing advice" in f.iloc[0]["caution"]


def test_pre_incubation_enters_the_competition_prediction_as_in_the_ode():
    # slow compound (RT 6 h) pre-incubated 2 h with the receptor, then a fast tracer for 1 h
    kw = dict(format="competition-binding", readout="Ki", incubation_s=1 * H, tracer_conc_M=1e-9, tracer_kd_M=1e-9,
              tracer_residence_time_s=5 * MIN, value_M=2e-9)
    without = predict_readings(reading(**kw)).iloc[0]["fold_shift"]
    with_pre = predict_readings(reading(**kw, preincubation_s=2 * H)).iloc[0]["fold_shift"]
    ref = ode_apparent_ki(1 * H, 1e-9, 1e-9, 1 / (5 * MIN), 1e-9, 1 / (6 * H), t_pre=2 * H) / 1e-9
    assert with_pre == pytest.approx(ref, rel=1e-4)
    assert with_pre < without


def test_every_reading_outside_the_band_fires_not_only_short_incubations():
    # 2.05 x RT with a 1.01-fold tolerance: outside the band although the 2 x RT rule of thumb is met
    assert len(check_affinity_underestimate(reading(incubation_s=2.05 * 6 * H), fold_tolerance=1.01)) == 1


def test_readings_of_one_assay_at_several_times_give_one_finding_about_the_worst():
    rows = pd.concat([reading(potency_id=10 + i, incubation_s=t, assay=a) for i, (t, a) in
                      enumerate([(15 * MIN, "bind 15m"), (1 * H, "bind 1h"), (2 * H, "bind 2h")])], ignore_index=True)
    rows["reading_group"] = "bind"
    f = check_affinity_underestimate(rows)
    assert len(f) == 1
    d = f.iloc[0]["data"]
    assert d["potency_id"] == 10 and d["n_readings"] == 3 and d["potency_ids"] == [10, 11, 12]
    # the one recommendation is the format-aware minimum: saturation closed form RT ln(2x/(x-1))/(1+x), x = 1.25
    assert d["recommended_incubation_s"] == pytest.approx(6 * H * math.log(10) / 2.25, rel=1e-9)


def test_an_incubation_beyond_the_practical_maximum_recommends_a_kinetic_method():
    row = reading(koff_per_s=1 / (40 * H), kon_per_M_s=1 / (40 * H) / 1e-9, max_incubation_s=16 * H)
    f = check_affinity_underestimate(row).iloc[0]
    assert f["data"]["kinetic_method_recommended"] is True and "recommended_incubation_s" not in f["data"]
    assert "practical maximum of 16 h" in f["prompt"] and "kinetic method" in f["prompt"]
    # the program default (rules configuration) applies when the row gives no maximum
    g = check_affinity_underestimate(reading(koff_per_s=1 / (40 * H), kon_per_M_s=1 / (40 * H) / 1e-9), max_incubation_s=1000 * H).iloc[0]
    assert g["data"]["kinetic_method_recommended"] is False


# ----------------------------------------------------------------------------- replicates
def test_replicate_runs_combine_by_geometric_mean_and_conflicts_take_the_slowest():
    kin = pd.DataFrame({"id": [1, 2, 3, 4], "compound_id": [7, 7, 8, 8], "method": ["spr"] * 4,
                        "koff_per_s": [1e-4, 2e-4, 1e-4, 5e-4], "kon_per_M_s": [1e6, 2e6, 1e6, 1e6], "kd_M": NAN,
                        "koff_low_per_s": NAN, "koff_high_per_s": NAN})
    sel = select_kinetics(kin).chosen.set_index("compound_id")
    assert sel.loc[7, "koff_per_s"] == pytest.approx(math.sqrt(2) * 1e-4) and not sel.loc[7, "conflict"]
    assert sel.loc[7, "kon_per_M_s"] == pytest.approx(math.sqrt(2) * 1e6)
    assert sel.loc[8, "conflict"] and sel.loc[8, "koff_per_s"] == 1e-4 and sel.loc[8, "kinetic_measurement_id"] == 3
    assert sel.loc[8, "koff_low_per_s"] <= 1e-4 and sel.loc[8, "koff_high_per_s"] >= 5e-4  # the interval spans both runs


def test_the_summary_names_the_worst_reading_in_either_direction():
    rows = pd.concat([reading(potency_id=1, incubation_s=16 * H), reading(potency_id=2, incubation_s=30 * MIN, assay="quick")],
                     ignore_index=True)
    rows = pd.concat([rows, predict_readings(rows)], axis=1)
    kin = pd.DataFrame({"compound_id": [1], "koff_per_s": [1 / (6 * H)], "koff_low_per_s": [NAN], "koff_high_per_s": [NAN],
                        "kinetic_measurement_id": [5], "n_runs": [1], "conflict": [False], "kinetics_basis": ["one run"]})
    s = summarise([1], kin, rows).iloc[0]
    assert s["worst_potency_id"] == 2 and s["worst_reading"].startswith("quick KD @ 30 min")
    assert s["worst_fold_shift"] == pytest.approx(rows.loc[1, "fold_shift"])


# ----------------------------------------------------------------------------- assay floor
def floor_row(value, t, **over):
    row = dict(compound_id=3, stage="lead-optimization", potency_id=int(t), assay="bind", readout="KD", value_M=value,
               incubation_s=t, format="binding", kon_per_M_s=1e6, kon_source="assumed")
    row.update(over)
    return row


def test_more_readings_tracking_the_floor_strengthen_the_evidence():
    # saturation floor ln2/(kon t) (exact koff -> 0 limit of the one-step read)
    one = check_assay_floor(pd.DataFrame([floor_row(1.1 * math.log(2) / (1e6 * H), H)]))
    two = check_assay_floor(pd.DataFrame([floor_row(1.1 * math.log(2) / (1e6 * H), H),
                                          floor_row(1.1 * math.log(2) / (1e6 * 4 * H), 4 * H)]))
    assert len(one) == len(two) == 1
    assert one.iloc[0]["severity"] == "low" and two.iloc[0]["severity"] == "moderate"
    assert two.iloc[0]["data"]["n_incubations"] == 2


def test_a_reading_far_below_the_floor_is_a_kon_or_data_question_not_slow_binding():
    f = check_assay_floor(pd.DataFrame([floor_row(0.1 * math.log(2) / (1e6 * H), H)]))
    assert list(f["rule"]) == ["potency-below-floor"]
    assert "not evidence of slow binding" in f.iloc[0]["message"]


# ----------------------------------------------------------------------------- tight binding
def morrison_ic50(e, ki):
    """IC50 from the Morrison equation v/v0 = 1 - [(E+I+K) - sqrt((E+I+K)^2 - 4EI)]/(2E) (Morrison 1969,
    Biochim Biophys Acta 185:269-286, from memory); reference: scipy brentq (computed)."""
    v = lambda i: 1 - ((e + i + ki) - math.sqrt((e + i + ki) ** 2 - 4 * e * i)) / (2 * e)  # noqa: E731
    return brentq(lambda i: v(i) - 0.5, 0, 1e-3, xtol=1e-22, rtol=1e-14)


def test_a_reading_near_the_titration_limit_is_flagged_and_a_weak_one_is_not():
    e = 10e-9
    tight = morrison_ic50(e, 0.1e-9)  # Ki 0.1 nM read with 10 nM enzyme: IC50 = Ki + E/2 (Copeland et al. 1995)
    assert tight == pytest.approx(0.1e-9 + e / 2, rel=1e-9)
    rows = pd.DataFrame([dict(compound_id=1, stage="lead-optimization", potency_id=1, assay="act", readout="IC50", value_M=tight,
                              format="enzyme", target_conc_M=e),
                         dict(compound_id=2, stage="lead-optimization", potency_id=2, assay="act", readout="IC50",
                              value_M=morrison_ic50(e, 50e-9), format="enzyme", target_conc_M=e)])
    f = check_tight_binding(rows)
    assert list(f["compound_id"]) == [1] and f.iloc[0]["rule"] == "tight-binding-limit"
    assert f.iloc[0]["data"]["titration_limit_M"] == pytest.approx(e / 2)


# ----------------------------------------------------------------------------- Munson-Rodbard
@pytest.mark.parametrize("r_t, l_t, kd, ki", [(1e-9, 1e-9, 1e-9, 1e-9), (5e-9, 0.5e-9, 0.2e-9, 1e-9), (2e-9, 3e-9, 1e-9, 5e-11)])
def test_the_depletion_corrected_cheng_prusoff_recovers_ki_from_an_exact_equilibrium(r_t, l_t, kd, ki):
    # exact equilibrium with depletion of receptor, tracer and competitor (mass balance solved with brentq, computed);
    # Munson & Rodbard 1988, J Recept Res 8:533-546: exact; Cheng & Prusoff 1973 is off when y0 is not small
    def eq(i_t):
        def f(r):
            return r + r * (l_t / (1 + r / kd)) / kd + r * (i_t / (1 + r / ki)) / ki - r_t
        r = brentq(f, 0, r_t, xtol=1e-30, rtol=1e-15)
        free_l = l_t / (1 + r / kd)
        return free_l, r * free_l / kd

    f0, b0 = eq(0.0)
    ic50 = brentq(lambda i: eq(i)[1] - b0 / 2, 0, 1e-3, xtol=1e-30, rtol=1e-14)
    y0 = tracer_bound_free_ratio(r_t, l_t, kd)
    assert y0 == pytest.approx(b0 / f0, rel=1e-9)
    assert munson_rodbard_ki(ic50, l_t, kd, y0) == pytest.approx(ki, rel=1e-8)
    assert munson_rodbard_ki(ic50, l_t, kd, 0.0) == pytest.approx(ic50 / (1 + l_t / kd))  # y0 -> 0: Cheng-Prusoff


def test_a_competition_ic50_with_the_receptor_concentration_is_converted_by_munson_rodbard():
    # no kon or KD measured: the compound's KD is estimated from the reported IC50; with 2 nM receptor and a
    # 1 nM tracer of KD 1 nM the depletion-corrected form applies (Munson & Rodbard 1988), without it Cheng-Prusoff
    kw = dict(format="competition-binding", readout="IC50", value_M=5e-9, incubation_s=48 * H, tracer_conc_M=1e-9,
              tracer_kd_M=1e-9, tracer_residence_time_s=5 * MIN, koff_per_s=1 / (10 * MIN), kon_per_M_s=NAN, kd_M=NAN)
    plain = predict_readings(reading(**kw)).iloc[0]
    depleted = predict_readings(reading(**kw, target_conc_M=2e-9)).iloc[0]
    y0 = tracer_bound_free_ratio(2e-9, 1e-9, 1e-9)
    # 48 h is far past equilibrium for RT 10 min: the estimate is the converted IC50 itself
    assert plain["kd_used_M"] == pytest.approx(5e-9 / 2, rel=1e-6)
    assert depleted["kd_used_M"] == pytest.approx(float(munson_rodbard_ki(5e-9, 1e-9, 1e-9, y0)), rel=1e-6)
    assert depleted["kd_used_M"] < plain["kd_used_M"]
