"""The measurement queue's ranking on plain frames (no database)."""

from __future__ import annotations

import json
import math

import pandas as pd

from tracker.rules.grader import Portfolio, grade_frames
from tracker.services.queue import STAGE_WEIGHT, UNCERTAINTY, rank_queue

NAN = math.nan


def portfolio(kinetics_rows) -> Portfolio:
    comp = pd.DataFrame([
        dict(id=1, name="HIT", program="P", series="S", stage="hit"),
        dict(id=2, name="ADV", program="P", series="S", stage="advanced-lead"),
        dict(id=3, name="LB", program="P", series="S", stage="candidate"),
        dict(id=4, name="WIDE", program="P", series="S", stage="candidate"),
        dict(id=5, name="PRECISE", program="P", series="S", stage="candidate"),
    ])
    progs = pd.DataFrame([dict(id=1, name="P", intended_profile=None, engagement_threshold=NAN, onset_max_s=NAN, duration_min_s=NAN,
                               offset_max_s=NAN, dosing_interval_s=NAN)])
    pot = pd.DataFrame([dict(id=i, compound_id=i, assay="act", readout="IC50", value_M=50e-9, incubation_s=3600.0, format="enzyme",
                             tracer_conc_M=NAN, tracer_kd_M=NAN, tracer_residence_time_s=NAN, max_response_fraction=NAN)
                        for i in range(1, 6)])
    kin = pd.DataFrame(kinetics_rows, columns=["id", "compound_id", "method", "kon_per_M_s", "koff_per_s", "kd_M", "koff_low_per_s",
                                               "koff_high_per_s", "fit_json", "time_course_id", "measured_on"])
    empty = pd.DataFrame(columns=["id", "compound_id", "species", "route", "half_life_s", "free_cmax_M", "tmax_s", "dosing_interval_s"])
    return Portfolio(comp, progs, pot, kin, empty, None)


def test_the_queue_puts_unmeasured_advanced_compounds_first_and_leaves_out_precise_measurements():
    lower_bound = json.dumps({"method": "dissociation", "estimates": {"koff": 1e-5}, "extras": {"rt_is_lower_bound": True}})
    p = portfolio([
        (1, 3, "spr", 1e6, 1e-5, NAN, NAN, NAN, lower_bound, NAN, pd.NaT),
        (2, 4, "spr", 1e6, 1e-3, NAN, 1e-4, 1e-2, None, NAN, pd.NaT),  # interval spans 100-fold
        (3, 5, "spr", 1e6, 1e-3, NAN, 0.9e-3, 1.1e-3, None, NAN, pd.NaT),
    ])
    q = rank_queue(grade_frames(p), p)
    assert list(q["compound"]) == ["ADV", "LB", "WIDE", "HIT"]
    assert dict(zip(q["compound"], q["uncertainty"])) == {"ADV": "unmeasured", "LB": "lower-bound", "WIDE": "wide-interval",
                                                          "HIT": "unmeasured"}
    adv = q.iloc[0]
    assert adv["score"] == STAGE_WEIGHT["advanced-lead"] * (1 + 3) * UNCERTAINTY["unmeasured"]
    assert adv["suggested_assay"] == "jump dilution" and "no residence time" in adv["reason"]
    assert list(q["rank"]) == [1, 2, 3, 4]
