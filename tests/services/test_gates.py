"""Gates on both backends: refused and allowed in each case, recorded in one transaction, append-only."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select, text
from sqlalchemy.exc import DBAPIError

from tracker.db import queries
from tracker.db.models import APPEND_ONLY_TABLES, AuditEvent, Compound, Decision, StageHistory
from tracker.db.triggers import drop_append_only
from tracker.errors import GateRefused, InputError, NotFoundError, PermissionDenied
from tracker.services import gates
from tracker.services.auditlog import verify
from tracker.services.users import deactivate_user

PASSWORD = "test-password-42"  # tests/conftest.py TEST_PASSWORD: every kestrel user's


def request_gate(*args, **kwargs):
    """The gate service, signed with the deciding user's password unless the test gives another."""
    kwargs.setdefault("password", PASSWORD)
    return gates.request_gate(*args, **kwargs)


def stage_of(engine, name):
    with engine.connect() as conn:
        return conn.execute(select(Compound.stage).where(Compound.name == name)).scalar_one()


def decisions(engine):
    with engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(select(Decision).order_by(Decision.id))]


def events(engine, action=None):
    df = queries.audit_events(engine, action=action)
    return df.to_dict("records")


# ----------------------------------------------------------------------------- refused
@pytest.mark.parametrize("user, words", [("sam", "is a scientist"), ("vic", "is a viewer")])
def test_a_gate_is_refused_when_the_user_is_not_a_lead(kestrel, user, words):
    with pytest.raises(GateRefused) as info:
        request_gate(kestrel, "K-HIT-1", "hit-to-lead", by=user, reason="promising")
    assert words in str(info.value) and "\n" not in str(info.value)
    assert stage_of(kestrel, "K-HIT-1") == "hit"
    d = decisions(kestrel)
    assert [(x["outcome"], x["by_user"], x["to_stage"]) for x in d] == [("refused", user, "hit-to-lead")]
    assert [e["actor"] for e in events(kestrel, "gate-refused")] == [user]


def test_a_deactivated_lead_may_not_pass_a_gate(kestrel, db_snapshot):
    deactivate_user(kestrel, "otto", by="lena", reason="left the team")
    before = db_snapshot(kestrel)
    with pytest.raises(PermissionDenied, match="deactivated"):
        request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="otto", reason="promising")
    assert db_snapshot(kestrel) == before  # a signature that fails records nothing


@pytest.mark.parametrize("by, password", [("nobody", PASSWORD), ("lena", "wrong-password-1"), ("lena", None), ("lena", "")])
def test_an_unknown_user_or_a_wrong_or_missing_password_signs_nothing(kestrel, db_snapshot, by, password):
    before = db_snapshot(kestrel)
    with pytest.raises(PermissionDenied) as info:
        request_gate(kestrel, "K-HIT-1", "hit-to-lead", by=by, reason="promising", password=password)
    assert "\n" not in str(info.value) and ("password" in str(info.value))
    assert db_snapshot(kestrel) == before


def test_a_gate_is_refused_when_residence_time_is_unmeasured_at_advanced_lead(kestrel):
    with pytest.raises(GateRefused) as info:
        request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="best in series")
    assert "unwaived high finding residence-time-unmeasured" in str(info.value)
    assert info.value.reasons == ["unwaived high finding residence-time-unmeasured"]
    assert stage_of(kestrel, "K-ADV-1") == "advanced-lead"
    d = decisions(kestrel)[-1]
    assert d["outcome"] == "refused" and "refused:" in d["reason"]
    snapshot = json.loads(d["evidence_json"])
    assert snapshot["grade"] == "high" and snapshot["findings"][0]["rule"] == "residence-time-unmeasured"


def test_waiving_a_different_rule_does_not_let_a_high_finding_through(kestrel):
    with pytest.raises(GateRefused, match="residence-time-unmeasured"):
        request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="x", waivers=["duration-mismatch"])


def test_a_gate_is_refused_when_it_skips_a_stage_without_a_waiver(kestrel):
    with pytest.raises(GateRefused) as info:
        request_gate(kestrel, "K-HIT-1", "lead-optimization", by="lena", reason="fast follower")
    assert "skips hit-to-lead" in str(info.value) and "stage-skip" in str(info.value)
    assert stage_of(kestrel, "K-HIT-1") == "hit"


def test_a_gate_to_the_current_stage_is_refused(kestrel):
    with pytest.raises(GateRefused, match="already at hit"):
        request_gate(kestrel, "K-HIT-1", "hit", by="lena", reason="x")


def test_a_scientist_cannot_waive_either(kestrel):
    with pytest.raises(GateRefused) as info:
        request_gate(kestrel, "K-ADV-1", "candidate", by="sam", reason="x", waivers=["residence-time-unmeasured"])
    assert "only a lead may decide gates or grant waivers" in str(info.value)
    assert stage_of(kestrel, "K-ADV-1") == "advanced-lead"


@pytest.mark.parametrize(
    "kwargs, error",
    [(dict(compound="NOPE", to_stage="hit-to-lead"), NotFoundError), (dict(compound="K-HIT-1", to_stage="phase-9"), InputError),
     (dict(compound="K-HIT-1", to_stage="hit-to-lead", waivers=["everything"]), InputError),
     (dict(compound="K-HIT-1", to_stage="hit-to-lead", reason="  "), InputError)],
)
def test_bad_input_records_nothing(kestrel, db_snapshot, kwargs, error):
    before = db_snapshot(kestrel)
    args = dict(by="lena", reason="ok") | kwargs
    with pytest.raises(error):
        request_gate(kestrel, **args)
    assert db_snapshot(kestrel) == before


# ----------------------------------------------------------------------------- allowed
def test_a_lead_passes_a_clear_compound_and_the_decision_stage_and_audit_are_written_together(kestrel):
    d = request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="clean profile")
    assert d["outcome"] == "approved" and d["grade"] == "clear"
    assert stage_of(kestrel, "K-HIT-1") == "hit-to-lead"
    row = decisions(kestrel)[-1]
    assert (row["outcome"], row["from_stage"], row["to_stage"], row["by_user"]) == ("approved", "hit", "hit-to-lead", "lena")
    hist = queries.stage_history(kestrel, compounds=["K-HIT-1"])
    assert list(hist["to_stage"]) == ["hit", "hit-to-lead"] and int(hist["decision_id"].iloc[-1]) == row["id"]
    actions = [e["action"] for e in events(kestrel)][-3:]
    assert actions == ["gate-approved", "stage-change", "sign"]
    assert verify(kestrel)["ok"]


def test_a_waived_high_finding_passes_and_the_snapshot_names_the_evidence(kestrel):
    d = request_gate(kestrel, "K-CAN-1", "clinical", by="lena", reason="offset acceptable for this indication",
                     waivers=["duration-mismatch:night dosing planned"], second_lead="otto", second_password=PASSWORD)
    assert d["outcome"] == "approved" and stage_of(kestrel, "K-CAN-1") == "clinical"
    row = decisions(kestrel)[-1]
    snap = json.loads(row["evidence_json"])
    assert snap["grade"] == "high" and snap["ruleset_version"] == row["ruleset_version"] == "krt-rules-2"
    assert [f["rule"] for f in snap["findings"]] == ["duration-mismatch"]
    assert snap["measurements"]["kinetic_measurement_ids"] and snap["measurements"]["pk_ids"] and snap["measurements"]["potency_ids"]
    assert snap["rule_settings"]["ki_shift_threshold"] == 6.0
    waivers = json.loads(row["waivers_json"])
    assert waivers == {"duration-mismatch": {"reason": "night dosing planned", "used": True}}
    waive = events(kestrel, "waive")[-1]
    assert waive["reason"] == "night dosing planned" and json.loads(waive["after_json"])["decision_id"] == row["id"]


def test_a_waiver_without_its_own_reason_takes_the_gate_reason(kestrel):
    request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="kinetics booked for March",
                 waivers=["residence-time-unmeasured"])
    assert json.loads(decisions(kestrel)[-1]["waivers_json"])["residence-time-unmeasured"]["reason"] == "kinetics booked for March"


def test_a_skip_with_the_stage_skip_waiver_passes(kestrel):
    d = request_gate(kestrel, "K-HIT-1", "lead-optimization", by="lena", reason="fast follower", waivers=["stage-skip"])
    assert d["outcome"] == "approved" and stage_of(kestrel, "K-HIT-1") == "lead-optimization"


def test_a_demotion_needs_a_lead_but_no_waiver(kestrel):
    d = request_gate(kestrel, "K-ADV-1", "hit-to-lead", by="lena", reason="selectivity problem")
    assert d["outcome"] == "approved" and stage_of(kestrel, "K-ADV-1") == "hit-to-lead"
    with pytest.raises(GateRefused):
        request_gate(kestrel, "K-CAN-1", "hit", by="sam", reason="x")


def test_a_failure_while_recording_leaves_nothing_behind(kestrel, db_snapshot, monkeypatch):
    before = db_snapshot(kestrel)

    def broken(*a, **k):
        raise RuntimeError("disk full")

    monkeypatch.setattr(gates, "append_events", broken)
    with pytest.raises(RuntimeError):
        request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="x")
    assert db_snapshot(kestrel) == before


# ----------------------------------------------------------------------------- append-only and tamper evidence
@pytest.mark.parametrize("statement", ["UPDATE decisions SET outcome = 'approved'", "DELETE FROM decisions"])
def test_decisions_written_by_gates_cannot_be_updated_or_deleted(kestrel, statement):
    with pytest.raises(GateRefused):
        request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="x")
    with pytest.raises(DBAPIError) as info:
        with kestrel.begin() as conn:
            conn.execute(text(statement))
    assert "append-only" in str(info.value)
    assert [d["outcome"] for d in decisions(kestrel)] == ["refused"]


def _drop_triggers(engine):
    with engine.begin() as conn:
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), engine.dialect.name, APPEND_ONLY_TABLES)


DECISION_EDITS = {
    "outcome": "'refused'",
    "to_stage": "'hit-to-lead'",
    "from_stage": "'hit'",
    "by_user": "'mallory'",
    "reason": "'rewritten'",
    "evidence_json": "'{}'",
    "waivers_json": "'{\"stage-skip\":{}}'",
    "ruleset_version": "'krt-rules-0'",
}


@pytest.mark.parametrize("column", list(DECISION_EDITS))
def test_an_edited_decision_no_longer_matches_its_audit_event(kestrel, column):
    request_gate(kestrel, "K-CAN-1", "clinical", by="lena", reason="ok", waivers=["duration-mismatch"],
                 second_lead="otto", second_password=PASSWORD)
    assert verify(kestrel)["ok"]
    _drop_triggers(kestrel)
    with kestrel.begin() as conn:
        conn.exec_driver_sql(f"UPDATE decisions SET {column} = {DECISION_EDITS[column]}")
    res = verify(kestrel)
    assert not res["ok"], column
    event_id = [e["id"] for e in events(kestrel, "gate-approved")][0]
    assert res["first_broken_id"] == event_id and column.replace("_json", "_sha256") in res["message"]


def test_the_hash_chain_still_covers_gate_events(kestrel):
    request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="ok")
    _drop_triggers(kestrel)
    target = [e["id"] for e in events(kestrel, "stage-change")][0]
    with kestrel.begin() as conn:
        conn.execute(text("UPDATE audit_events SET actor = 'mallory' WHERE id = :i"), {"i": target})
    res = verify(kestrel)
    assert not res["ok"] and res["first_broken_id"] == target


def test_verify_counts_the_decisions_it_checked(kestrel):
    with pytest.raises(GateRefused):
        request_gate(kestrel, "K-ADV-1", "candidate", by="sam", reason="x")
    request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="ok")
    assert "2 decision(s) match" in verify(kestrel)["message"]
    with kestrel.connect() as conn:
        n = conn.execute(select(AuditEvent.id).where(AuditEvent.entity_type == "decision")).all()
        assert len(n) == 2
        assert conn.execute(select(StageHistory.id)).all()


def test_concurrent_gates_are_all_recorded_and_the_chain_still_verifies(kestrel):
    import threading

    jobs = [("K-HIT-1", "hit-to-lead", "lena", []), ("E-LO-1", "advanced-lead", "otto", []),
            ("K-ADV-1", "candidate", "lena", []), ("K-CAN-1", "clinical", "otto", ["duration-mismatch"])]
    outcomes: dict[str, str] = {}
    errors: list[BaseException] = []

    def work(name, to, by, waivers):
        try:
            second = {"second_lead": "lena" if by == "otto" else "otto", "second_password": PASSWORD} if waivers else {}
            outcomes[name] = request_gate(kestrel, name, to, by=by, reason="parallel review", waivers=waivers, **second)["outcome"]
        except GateRefused:
            outcomes[name] = "refused"
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=job) for job in jobs]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert outcomes == {"K-HIT-1": "approved", "E-LO-1": "approved", "K-ADV-1": "refused", "K-CAN-1": "approved"}
    assert len(decisions(kestrel)) == 4
    res = verify(kestrel)
    assert res["ok"], res["message"]


def test_a_preview_says_what_blocks_a_gate_and_writes_nothing(kestrel, db_snapshot):
    from tracker.services.gates import preview_gate

    before = db_snapshot(kestrel)
    p = preview_gate(kestrel, "K-ADV-1", "candidate")
    assert p["would_pass"] is False and p["blocking"] == ["residence-time-unmeasured"] and p["grade"] == "high"
    assert preview_gate(kestrel, "K-ADV-1", "candidate", waivers=["residence-time-unmeasured"])["would_pass"] is True
    assert preview_gate(kestrel, "K-HIT-1", "hit-to-lead", by="sam")["reasons"] == ["user 'sam' is a scientist; only a lead may decide gates"]
    assert db_snapshot(kestrel) == before
