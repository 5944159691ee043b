"""The grader on plain frames: precedence between evidence, grades, the JSON contract, overrides, saved fits."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from tracker.kinetics.fitting import fit_insurmountability, fit_ki_shift
from tracker.rules.config import DEFAULTS, GRADES, version_label
from tracker.rules.grader import Portfolio, assay_key, grade_frames, parse_fit

NAN = math.nan
H = 3600.0
MIN = 60.0


class Book:
    """A small portfolio written row by row, turned into the frames the queries return."""

    def __init__(self):
        self.programs = [dict(id=1, name="P", intended_profile="short-acting", engagement_threshold=0.3, onset_max_s=NAN,
                              duration_min_s=NAN, offset_max_s=8 * H, dosing_interval_s=NAN),
                         dict(id=2, name="Q", intended_profile="once-daily", engagement_threshold=0.5, onset_max_s=NAN,
                              duration_min_s=NAN, offset_max_s=NAN, dosing_interval_s=NAN)]
        self.compounds, self.potency, self.kinetics, self.pk, self.time_courses = [], [], [], [], []

    def compound(self, name, stage, program="P", series="S1"):
        cid = len(self.compounds) + 1
        self.compounds.append(dict(id=cid, name=name, program=program, series=series, stage=stage))
        return cid

    def potency_row(self, cid, value, incubation, assay="bind", readout="KD", format="binding", **over):
        row = dict(id=len(self.potency) + 1, compound_id=cid, assay=assay, readout=readout, value_M=value, incubation_s=incubation,
                   format=format, tracer_conc_M=NAN, tracer_kd_M=NAN, tracer_residence_time_s=NAN, max_response_fraction=NAN)
        row.update(over)
        self.potency.append(row)
        return row["id"]

    def kinetics_row(self, cid, koff, kon=NAN, kd=NAN, **over):
        row = dict(id=len(self.kinetics) + 1, compound_id=cid, method="spr", kon_per_M_s=kon, koff_per_s=koff, kd_M=kd,
                   koff_low_per_s=NAN, koff_high_per_s=NAN, fit_json=None, time_course_id=NAN, measured_on=pd.NaT)
        row.update(over)
        self.kinetics.append(row)
        return row["id"]

    def pk_row(self, cid, **over):
        row = dict(id=len(self.pk) + 1, compound_id=cid, species="rat", route="iv", half_life_s=2 * H, free_cmax_M=10e-9,
                   tmax_s=NAN, dosing_interval_s=NAN)
        row.update(over)
        self.pk.append(row)
        return row["id"]

    def time_course(self, cid, meta: dict):
        self.time_courses.append(dict(id=len(self.time_courses) + 1, compound_id=cid, method="other", meta_json=json.dumps(meta)))

    def portfolio(self) -> Portfolio:
        def frame(rows, cols):
            return pd.DataFrame(rows, columns=cols) if rows else pd.DataFrame(columns=cols)

        return Portfolio(
            compounds=frame(self.compounds, ["id", "name", "program", "series", "stage"]),
            programs=frame(self.programs, list(self.programs[0])),
            potency=frame(self.potency, ["id", "compound_id", "assay", "readout", "value_M", "incubation_s", "format", "tracer_conc_M",
                                         "tracer_kd_M", "tracer_residence_time_s", "max_response_fraction"]),
            kinetics=frame(self.kinetics, ["id", "compound_id", "method", "kon_per_M_s", "koff_per_s", "kd_M", "koff_low_per_s",
                                           "koff_high_per_s", "fit_json", "time_course_id", "measured_on"]),
            pk=frame(self.pk, ["id", "compound_id", "species", "route", "half_life_s", "free_cmax_M", "tmax_s", "dosing_interval_s"]),
            time_courses=frame(self.time_courses, ["id", "compound_id", "method", "meta_json"]),
        )

    def grade(self, **kw):
        return grade_frames(self.portfolio(), **kw)


def entry(result, name):
    return next(e for e in result.to_records() if e["compound"] == name)


def evidence(e):
    return sorted(f.get("evidence", "") for f in e["findings"] if f["rule"] == "affinity-underestimate")


# ----------------------------------------------------------------------------- precedence
def test_a_measured_residence_time_overrides_the_inferred_evidence():
    b = Book()
    c = b.compound("A", "lead-optimization")
    b.potency_row(c, 10e-9, 30 * MIN)  # reads 10x weaker at 30 min ...
    b.potency_row(c, 1e-9, 16 * H)  # ... than at 16 h
    b.potency_row(c, 2e-9, 1 * H, assay="calcium", format="functional", readout="Kb", max_response_fraction=0.4)
    without = entry(b.grade(), "A")
    assert set(evidence(without)) >= {"ki-shift", "insurmountable"}
    b.kinetics_row(c, koff=1 / (6 * H), kon=1 / (6 * H) / 1e-9)
    with_rt = entry(b.grade(), "A")
    assert set(evidence(with_rt)) == {"residence-time"}
    assert all(f["likely"] is False for f in with_rt["findings"] if f["rule"] == "affinity-underestimate")


def test_a_ki_shift_comparison_showing_no_shift_overrides_the_assay_floor():
    floor_1h = math.log(2) / (DEFAULTS.assumed_kon_per_M_s * H)
    b = Book()
    c = b.compound("A", "lead-optimization")
    b.potency_row(c, 1.2 * floor_1h, 1 * H)
    b.potency_row(c, 1.0 * floor_1h, 16 * H)  # ratio 1.2: no shift
    d = b.compound("B", "lead-optimization")
    b.potency_row(d, 3.0 * 0.6 * floor_1h, 1 * H)
    b.potency_row(d, 0.6 * floor_1h, 16 * H)  # ratio 3: inconclusive, the floor heuristic stays
    r = b.grade()
    assert evidence(entry(r, "A")) == []
    assert entry(r, "A")["grade"] == "clear"
    assert "assay-floor" in evidence(entry(r, "B"))


def test_a_shifting_compound_gets_the_ki_shift_finding_and_lead_optimization_asks_for_residence_time():
    b = Book()
    c = b.compound("A", "lead-optimization")
    b.potency_row(c, 8e-9, 30 * MIN, assay="bind 30m")
    b.potency_row(c, 1e-9, 16 * H, assay="bind 16h")
    e = entry(b.grade(), "A")
    rules = [(f["rule"], f["severity"]) for f in e["findings"]]
    assert ("residence-time-unmeasured", "moderate") in rules
    assert ("affinity-underestimate", "moderate") in rules
    rt = next(f for f in e["findings"] if f["rule"] == "residence-time-unmeasured")
    assert "Ki shift (8×" in rt["message"]


def test_potency_values_pair_only_within_one_assay_readout_and_format():
    b = Book()
    c = b.compound("A", "hit-to-lead")
    b.potency_row(c, 8e-9, 30 * MIN, assay="kinase 30 min", format="enzyme", readout="IC50")
    b.potency_row(c, 1e-9, 16 * H, assay="bind 16h")  # another format: no pair
    assert "ki-shift" not in evidence(entry(b.grade(), "A"))
    assert assay_key("TM protease 15m") == assay_key("TM protease 3h") == "tm protease"
    assert assay_key("HF bind 16 h") == assay_key("HF bind 1h") == "hf bind"
    assert assay_key("cell 2") != assay_key("cell 3")


def test_replicates_at_one_incubation_enter_the_ratio_as_a_geometric_mean():
    b = Book()
    c = b.compound("A", "hit-to-lead")
    for v in (4e-9, 16e-9):  # geometric mean 8 nM
        b.potency_row(c, v, 30 * MIN)
    b.potency_row(c, 1e-9, 16 * H)
    f = next(f for f in entry(b.grade(), "A")["findings"] if f.get("evidence") == "ki-shift")
    assert f["ki_shift_ratio"] == pytest.approx(8.0, rel=1e-12)
    assert f["potency_ids"] == [1, 2, 3]


# ----------------------------------------------------------------------------- grades and the contract
def test_the_grade_is_the_worst_finding_and_clear_without_findings():
    b = Book()
    a = b.compound("A", "advanced-lead")  # no kinetics: high
    c = b.compound("C", "hit")  # nothing: clear
    b.potency_row(c, 50e-9, 1 * H)
    d = b.compound("D", "hit")  # a weak measured shift: low
    b.potency_row(d, 1e-9, 1 * H)
    b.kinetics_row(d, koff=1 / (2 * H), kon=1 / (2 * H) / 0.5e-9)
    r = b.grade()
    grades = {e["compound"]: e["grade"] for e in r.to_records()}
    assert grades == {"A": "high", "C": "clear", "D": "low"}
    assert set(grades.values()) <= set(GRADES)
    assert list(r.compounds.loc[r.compounds["compound"] == "A", "top_rule"]) == ["residence-time-unmeasured"]
    assert a == 1


def test_the_json_contract_has_the_agreed_keys_and_plain_json_values():
    b = Book()
    c = b.compound("A", "candidate")
    b.potency_row(c, 5e-9, 1 * H)
    b.kinetics_row(c, koff=1 / (6 * H), kon=1 / (6 * H) / 1e-9, koff_low_per_s=1 / (8 * H), koff_high_per_s=1 / (4 * H))
    b.pk_row(c)
    records = b.grade().to_records()
    assert set(records[0]) == {"compound", "program", "series", "stage", "grade", "findings"}
    for f in records[0]["findings"]:
        assert {"rule", "severity", "message", "prompt"} <= set(f)
        assert f["severity"] in ("high", "moderate", "low")
        assert f["rule"] in ("residence-time-unmeasured", "affinity-underestimate", "duration-mismatch")
    text = json.dumps(records, allow_nan=False)  # no NaN, no numpy types
    assert "fold_shift_ci95" in text and "kinetic_measurement_id" in text


def test_findings_are_ordered_worst_first_within_a_compound():
    b = Book()
    c = b.compound("A", "candidate")
    b.potency_row(c, 1.3e-9, 8 * H)  # small shift: moderate at candidate
    b.potency_row(c, 30e-9, 10 * MIN)  # big shift: high
    b.kinetics_row(c, koff=1 / (6 * H), kon=1 / (6 * H) / 1e-9)
    sev = [f["severity"] for f in entry(b.grade(), "A")["findings"]]
    ranks = {"high": 3, "moderate": 2, "low": 1}
    assert sev == sorted(sev, key=lambda s: -ranks[s]) and sev[0] == "high"


def test_conflicting_kinetic_runs_raise_a_finding_and_the_grade_uses_the_longer_residence_time():
    b = Book()
    c = b.compound("A", "candidate")
    b.potency_row(c, 1e-9, 1 * H)
    b.kinetics_row(c, koff=1 / (10 * MIN), kon=1e7, measured_on=pd.Timestamp("2026-03-01"))
    slow = b.kinetics_row(c, koff=1 / (6 * H), kon=1e5, measured_on=pd.Timestamp("2026-01-01"))
    r = b.grade()
    row = r.compounds.iloc[0]
    assert row["residence_time_s"] == pytest.approx(6 * H)  # the conservative value: more potency risk
    assert row["kinetic_measurement_id"] == slow and bool(row["kinetics_conflict"])
    f = next(f for f in entry(r, "A")["findings"] if f["rule"] == "conflicting-kinetics")
    assert f["spread_fold"] == pytest.approx(36.0) and "resolve" in f["prompt"].lower()
    assert any(g["rule"] == "affinity-underestimate" for g in entry(r, "A")["findings"])


def test_agreeing_kinetic_runs_are_combined_by_geometric_mean_with_the_between_run_spread_in_the_interval():
    b = Book()
    c = b.compound("A", "hit")
    b.potency_row(c, 1e-9, 1 * H)
    koffs = [1 / (4 * H), 1 / (6 * H), 1 / (9 * H)]  # within 3x of each other
    for k in koffs:
        b.kinetics_row(c, koff=k, kon=1e6)
    r = b.grade()
    row = r.compounds.iloc[0]
    assert not bool(row["kinetics_conflict"]) and row["n_kinetic_runs"] == 3
    gm = math.exp(np.mean(np.log(koffs)))
    assert row["residence_time_s"] == pytest.approx(1 / gm, rel=1e-12)
    # 95% interval of the mean of log koff: t(0.975, 2 df) = 4.303 (statistical tables) x sd/sqrt(3)
    half = 4.303 * np.std(np.log(koffs), ddof=1) / math.sqrt(3)
    assert row["residence_time_low_s"] == pytest.approx(1 / (gm * math.exp(half)), rel=1e-9)
    assert row["residence_time_high_s"] == pytest.approx(1 / (gm * math.exp(-half)), rel=1e-9)
    assert not any(f["rule"] == "conflicting-kinetics" for f in entry(r, "A")["findings"])


# ----------------------------------------------------------------------------- configuration
def test_a_program_override_applies_to_that_program_only():
    b = Book()
    for name, prog in (("A", "P"), ("B", "Q")):
        c = b.compound(name, "hit-to-lead", program=prog)
        b.potency_row(c, 7e-9, 30 * MIN)
        b.potency_row(c, 1e-9, 16 * H)
    cfg = {"P": DEFAULTS.with_overrides({"ki_shift_threshold": 20, "no_shift_ratio": 8})}
    r = b.grade(configs=cfg, versions={"P": version_label(0, 1, 1)})
    assert "ki-shift" not in evidence(entry(r, "A"))
    assert "ki-shift" in evidence(entry(r, "B"))
    assert set(r.compounds["ruleset_version"]) == {"krt-rules-2+p1v1", "krt-rules-2"}


# ----------------------------------------------------------------------------- saved fits
def _logistic(x, ic50, top=100.0, bottom=0.0, hill=1.0):
    return bottom + (top - bottom) / (1 + (x / ic50) ** hill)


def test_a_saved_ki_shift_fit_in_a_time_course_is_read_as_evidence():
    rng = np.random.default_rng(7)
    dose = np.tile(np.logspace(-11, -6, 11), 2)
    inc = np.repeat([30 * MIN, 16 * H], 11)
    signal = np.where(inc < H, _logistic(dose, 9e-9), _logistic(dose, 1e-9)) + rng.normal(0, 1.0, dose.size)
    fit = fit_ki_shift(dose, signal, inc)
    b = Book()
    c = b.compound("A", "lead-optimization")
    b.time_course(c, {"fit_method": "ki-shift", "fit": fit.to_dict()})
    f = next(f for f in entry(b.grade(), "A")["findings"] if f.get("evidence") == "ki-shift")
    assert f["ki_shift_ratio"] == pytest.approx(fit.estimates["ki_shift_ratio"])
    assert f["source"] == "fit" and f["time_course_id"] == 1
    assert "95% interval" in f["message"]
    assert f["incubation_short_s"] == 30 * MIN and f["incubation_long_s"] == 16 * H


def test_a_saved_insurmountability_fit_is_read_and_a_qualitative_fit_is_not_a_residence_time():
    rng = np.random.default_rng(3)
    dose = np.tile(np.logspace(-10, -5, 11), 2)
    curve = np.repeat(["control", "antagonist"], 11)
    resp = np.where(curve == "control", 100 - _logistic(dose, 1e-8), 40 - 0.4 * _logistic(dose, 5e-8)) + rng.normal(0, 1.0, dose.size)
    fit = fit_insurmountability(dose, resp, curve)
    b = Book()
    c = b.compound("A", "candidate")
    # stored as a kinetic measurement carrying a qualitative fit: must not count as a measured residence time
    b.kinetics_row(c, koff=1.0, fit_json=json.dumps(fit.to_dict()))
    e = entry(b.grade(), "A")
    f = next(f for f in e["findings"] if f.get("evidence") == "insurmountable")
    assert f["max_response_fraction"] == pytest.approx(fit.estimates["max_response_fraction"])
    assert f["severity"] == "high"  # candidate
    assert any(f["rule"] == "residence-time-unmeasured" for f in e["findings"])


def test_parse_fit_reads_both_stored_shapes_and_ignores_junk():
    flat = parse_fit(json.dumps({"method": "ki-shift", "ki_shift_ratio": 7.0, "ki_shift_ratio_ci95": [5.0, None],
                                 "incubation_short_s": 60.0, "incubation_long_s": 600.0}))
    assert flat["ratio"] == 7.0 and flat["ratio_high"] == math.inf and flat["incubation_long_s"] == 600.0
    assert parse_fit("not json") is None and parse_fit(None) is None and parse_fit("[1, 2]") is None


# ----------------------------------------------------------------------------- floor and duration inputs
def test_the_floor_uses_the_series_median_kon_when_the_series_has_one():
    floor_assumed = math.log(2) / (1e6 * H)
    b = Book()
    for i, kon in enumerate((8e6, 1e7, 1.2e7)):
        k = b.compound(f"K{i}", "hit")
        b.kinetics_row(k, koff=1e-2, kon=kon)
    c = b.compound("A", "hit")
    b.potency_row(c, 1.5 * floor_assumed, 1 * H)  # at the floor for 1e6, far above it for 1e7
    d = b.compound("D", "hit", series="S2")
    b.potency_row(d, 1.5 * floor_assumed, 1 * H)
    r = b.grade()
    assert "assay-floor" not in evidence(entry(r, "A"))
    f = next(f for f in entry(r, "D")["findings"] if f.get("evidence") == "assay-floor")
    assert f["kon_per_M_s"] == 1e6 and "assumed" in f["kon_source"]


def test_duration_uses_an_equilibrium_corrected_potency_when_kon_was_not_measured_and_prefers_human_pk():
    b = Book()
    c = b.compound("A", "candidate")
    b.potency_row(c, 1e-9, 48 * H, readout="Ki")  # long enough to read ~at equilibrium
    b.kinetics_row(c, koff=1 / (6 * H))  # koff only (e.g. a dissociation fit)
    b.pk_row(c, species="rat", free_cmax_M=1e-6)
    human = b.pk_row(c, species="human", free_cmax_M=10e-9)
    f = next(f for f in entry(b.grade(), "A")["findings"] if f["rule"] == "duration-mismatch")
    assert f["pk_id"] == human
    assert "corrected to equilibrium" in f["message"]
    assert f["kd_M"] == pytest.approx(1e-9, rel=0.01)


def test_a_portfolio_of_thousands_is_graded_in_one_pass_with_a_grade_for_every_compound():
    rng = np.random.default_rng(11)
    b = Book()
    stages = ["hit", "hit-to-lead", "lead-optimization", "advanced-lead", "candidate", "clinical"]
    for i in range(3000):
        c = b.compound(f"C{i}", stages[i % 6], series=f"S{i % 7}")
        b.potency_row(c, 10 ** rng.uniform(-10, -7), float(rng.choice([15 * MIN, H, 4 * H])))
        if i % 3 == 0:
            koff = 10 ** rng.uniform(-5, -2)
            b.kinetics_row(c, koff=koff, kon=10 ** rng.uniform(5, 7))
        if i % 5 == 0:
            b.pk_row(c, route="oral", tmax_s=H)
    r = b.grade()
    assert len(r.compounds) == 3000 and r.compounds["grade"].isin(GRADES).all()
    assert {"residence-time-unmeasured", "affinity-underestimate", "duration-mismatch"} <= set(r.findings["rule"])


def test_without_an_equilibrium_constant_an_ic50_corrected_to_equilibrium_stands_in_for_kd():
    b = Book()
    c = b.compound("A", "candidate")
    b.potency_row(c, 1e-9, 48 * H, readout="IC50", format="enzyme")
    b.kinetics_row(c, koff=1 / (6 * H))
    b.pk_row(c)
    f = next(f for f in entry(b.grade(), "A")["findings"] if f["rule"] == "duration-mismatch")
    assert "IC50 from bind corrected to equilibrium, taken as KD" in f["message"]


def test_a_program_without_an_intended_profile_gets_no_duration_findings():
    b = Book()
    b.programs[1].update(engagement_threshold=NAN)
    c = b.compound("A", "candidate", program="Q")  # Q sets no limits
    b.potency_row(c, 1e-9, 48 * H)
    b.kinetics_row(c, koff=1 / (6 * H), kon=1 / (6 * H) / 1e-9)
    assert entry(b.grade(), "A")["grade"] == "clear"
