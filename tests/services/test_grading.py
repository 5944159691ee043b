"""Grading through the database on both backends: the designed portfolio, rule overrides, the queue."""

from __future__ import annotations

import json

import pytest

from tracker.db import queries
from tracker.errors import InputError, NotFoundError, PermissionDenied
from tracker.services.grading import (
    findings_frame,
    grade_compound,
    grade_portfolio,
    grade_portfolio_frame,
    rule_settings,
    set_rule_override,
)
from tracker.services.queue import measurement_queue


def test_the_designed_portfolio_grades_as_designed(kestrel, expected_grades):
    records = grade_portfolio(kestrel)
    assert {r["compound"]: r["grade"] for r in records} == expected_grades
    rules = {r["compound"]: sorted({f["rule"] for f in r["findings"]}) for r in records}
    assert rules == {
        "K-ADV-1": ["residence-time-unmeasured"],
        "K-ADV-2": [],
        "K-LO-1": ["affinity-underestimate", "residence-time-unmeasured"],
        "K-HIT-1": [],
        "K-CAN-1": ["duration-mismatch"],
        "E-LO-1": ["affinity-underestimate"],
        "P-LO-1": ["conflicting-kinetics"],
        "P-HTL-1": ["tight-binding-limit"],
        "P-HIT-1": ["affinity-underestimate"],
    }
    json.dumps(records, allow_nan=False)


def test_the_program_filter_and_an_unknown_program(kestrel):
    assert [r["compound"] for r in grade_portfolio(kestrel, program="Egret")] == ["E-LO-1"]
    with pytest.raises(NotFoundError):
        grade_portfolio(kestrel, program="Nowhere")


def test_the_dashboard_frames_carry_the_numbers(kestrel):
    df = grade_portfolio_frame(kestrel).set_index("compound")
    assert df.loc["E-LO-1", "residence_time_s"] == pytest.approx(7200.0)
    assert df.loc["E-LO-1", "max_fold_shift"] > 4
    assert df.loc["K-CAN-1", "top_rule"] == "duration-mismatch"
    f = findings_frame(kestrel)
    assert set(f["compound"]) == {"K-ADV-1", "K-LO-1", "K-CAN-1", "E-LO-1", "P-LO-1", "P-HTL-1", "P-HIT-1"}


def test_one_compound_is_graded_with_its_series_as_context(kestrel):
    entry, result, portfolio = grade_compound(kestrel, "K-LO-1")
    assert entry["grade"] == "moderate"
    assert set(portfolio.compounds["name"]) == {"K-ADV-1", "K-ADV-2", "K-LO-1", "K-CAN-1"}  # series A only
    with pytest.raises(NotFoundError):
        grade_compound(kestrel, "nope")


def test_a_lead_overrides_a_threshold_for_one_program_and_the_change_is_versioned_and_audited(kestrel):
    info = set_rule_override(kestrel, "Kestrel", {"no_shift_ratio": "12", "ki_shift_threshold": "20"}, by="lena",
                             reason="noisy binding assay")
    assert info["settings"]["no_shift_ratio"] == 12.0 and info["source"]["no_shift_ratio"] == "program"
    assert info["version"].startswith("krt-rules-2+p") and info["version"].endswith("v1")
    grades = {r["compound"]: r["grade"] for r in grade_portfolio(kestrel)}
    assert grades["K-LO-1"] == "clear"  # the 10x shift is now within the program's replicate scatter
    info2 = set_rule_override(kestrel, "Kestrel", {}, by="lena", reason="back to default", unset=["no_shift_ratio", "ki_shift_threshold"])
    assert info2["version"].endswith("v2") and info2["source"]["no_shift_ratio"] == "default"
    assert {r["compound"]: r["grade"] for r in grade_portfolio(kestrel)}["K-LO-1"] == "moderate"
    ev = queries.audit_events(kestrel, entity_type="rule_config")
    assert list(ev["actor"]) == ["lena", "lena"] and list(ev["reason"]) == ["noisy binding assay", "back to default"]
    assert json.loads(ev["after_json"].iloc[0])["settings"] == {"no_shift_ratio": 12.0, "ki_shift_threshold": 20.0}
    assert len(queries.rule_configs(kestrel)) == 2


def test_a_global_override_reaches_every_program(kestrel):
    set_rule_override(kestrel, None, {"fold_tolerance": 10, "fold_moderate": 10}, by="lena", reason="triage mode")
    assert rule_settings(kestrel, "Egret")["settings"]["fold_tolerance"] == 10.0
    assert {r["compound"]: r["grade"] for r in grade_portfolio(kestrel)}["E-LO-1"] == "clear"


@pytest.mark.parametrize(
    "kwargs, error",
    [(dict(by="sam"), PermissionDenied), (dict(by="vic"), PermissionDenied), (dict(settings={"fold_tolerance": 0.5}), InputError),
     (dict(settings={"nonsense": 1}), InputError), (dict(reason=""), InputError), (dict(program="Nowhere"), NotFoundError)],
)
def test_rule_changes_by_non_leads_or_with_bad_values_write_nothing(kestrel, db_snapshot, kwargs, error):
    before = db_snapshot(kestrel)
    args = dict(program="Kestrel", settings={"ki_shift_threshold": 8}, by="lena", reason="why") | kwargs
    with pytest.raises(error):
        set_rule_override(kestrel, args.pop("program"), args.pop("settings"), **args)
    assert db_snapshot(kestrel) == before


def test_the_queue_ranks_by_stage_grade_and_uncertainty_and_suggests_an_assay(kestrel):
    q = measurement_queue(kestrel)
    names = [e["compound"] for e in q]
    assert names[0] == "K-ADV-1"  # advanced-lead, high, no residence time
    assert names.index("K-LO-1") < names.index("K-HIT-1")
    assert not {"K-ADV-2", "K-CAN-1", "E-LO-1"} & set(names)  # precise residence times: nothing to gain
    assert q[0]["rank"] == 1 and "SPR" in q[0]["suggested_assay"] and "no residence time" in q[0]["reason"]
    assert [e["score"] for e in q] == sorted((e["score"] for e in q), reverse=True)
    assert len(measurement_queue(kestrel, limit=1)) == 1
