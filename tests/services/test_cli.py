"""``krt grade``, ``rules``, ``queue``, ``user``, ``gate`` and ``audit`` through ``tracker.cli.main``."""

from __future__ import annotations

import io
import json

import pytest

from tracker.db.models import APPEND_ONLY_TABLES
from tracker.db.triggers import drop_append_only


def test_grade_json_follows_the_contract(cli, expected_grades):
    code, out, err = cli("grade", "--json")
    assert code == 0 and err == ""
    records = json.loads(out)
    assert {r["compound"]: r["grade"] for r in records} == expected_grades
    assert all(set(r) == {"compound", "program", "series", "stage", "grade", "findings"} for r in records)


def test_grade_text_shows_grades_findings_prompts_and_cautions(cli):
    code, out, _ = cli("grade", "--program", "Kestrel")
    assert code == 0
    assert "K-CAN-1" in out and "High risk" in out and "E-LO-1" not in out
    assert "-> Review the prolonged offset" in out and "next-day impairment" in out
    code, out, _ = cli("grade", "--summary")
    assert "->" not in out and "9 compound(s): 2 high risk, 3 moderate risk, 2 low risk, 2 no flags" in out
    code, out, _ = cli("grade", "--compound", "E-LO-1", "--json")
    assert [r["compound"] for r in json.loads(out)] == ["E-LO-1"]


def test_grade_of_an_unknown_program_is_one_line_and_non_zero(cli):
    code, out, err = cli("grade", "--program", "Nowhere")
    assert code != 0 and out == "" and err.count("\n") == 1 and "Nowhere" in err


def test_rules_show_and_set(cli):
    code, out, err = cli("rules", "set", "--program", "Kestrel", "ki_shift_threshold=12", "--by", "lena", "--reason", "noisy assay",
                         as_user="lena")
    assert code == 0, err
    code, out, _ = cli("rules", "show", "--program", "Kestrel", "--json")
    info = json.loads(out)
    assert info["settings"]["ki_shift_threshold"] == 12.0 and info["source"]["ki_shift_threshold"] == "program"
    code, out, err = cli("rules", "set", "--program", "Kestrel", "ki_shift_threshold=3", "--by", "sam", "--reason", "x", as_user="sam")
    assert code == 2 and "only a lead" in err and err.count("\n") == 1
    code, out, err = cli("rules", "set", "--program", "Kestrel", "ki_shift_threshold", "--by", "lena", "--reason", "x")
    assert code == 2 and "KEY=VALUE" in err


def test_queue_json_and_text(cli):
    code, out, _ = cli("queue", "--json")
    q = json.loads(out)
    assert code == 0 and q[0]["compound"] == "K-ADV-1" and {"rank", "score", "suggested_assay", "reason"} <= set(q[0])
    code, out, _ = cli("queue", "--limit", "2")
    assert code == 0 and "K-ADV-1" in out and "suggested assay" in out


def test_user_add_and_list(cli):
    code, out, err = cli("user", "add", "mia", "--role", "scientist", "--by", "lena", as_user="lena", signed=1)
    assert code == 0 and "mia added as scientist" in out
    code, out, err = cli("user", "add", "zed", "--role", "lead", "--by", "mia", as_user="mia", signed=1)
    assert code == 2 and "only a lead may add users" in err
    code, out, _ = cli("user", "list", "--json")
    assert {u["name"]: u["role"] for u in json.loads(out)}["mia"] == "scientist"


def test_user_add_on_an_empty_database_bootstraps_a_lead(migrated_engine, capsys, monkeypatch):
    from tracker.cli import main

    url = migrated_engine.url.render_as_string(hide_password=False)
    monkeypatch.setenv("KRT_DATABASE_URL", url)
    monkeypatch.setattr("sys.stdin", io.StringIO("ana-password-1\nana-password-1\n"))
    assert main(["user", "add", "ana", "--role", "viewer", "--password-stdin"]) == 2
    assert "first user must be a lead" in capsys.readouterr().err
    assert main(["user", "add", "ana", "--role", "lead", "--password-stdin"]) == 0
    assert "ana added as lead (first user: the bootstrap lead)" in capsys.readouterr().out
    # from now on only a signed-in lead adds users
    monkeypatch.setattr("sys.stdin", io.StringIO("bob-password-1\n"))
    assert main(["user", "add", "bob", "--role", "lead", "--password-stdin"]) == 2
    assert "nobody is signed in" in capsys.readouterr().err


def test_gate_refused_is_one_line_with_a_non_zero_exit_and_recorded(cli):
    code, out, err = cli("gate", "K-ADV-1", "--to", "candidate", "--by", "lena", "--reason", "best compound",
                         as_user="lena", signed=1)
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "unwaived high finding residence-time-unmeasured" in err and "recorded as decision 1" in err
    code, out, err = cli("gate", "K-HIT-1", "--to", "lead-optimization", "--by", "lena", "--reason", "x", signed=1)
    assert code == 2 and "stage-skip" in err
    code, out, err = cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--by", "vic", "--reason", "x", as_user="vic", signed=1)
    assert code == 2 and "is a viewer" in err


def test_gate_approved_with_a_waiver_and_json(cli):
    code, out, err = cli("gate", "K-ADV-1", "--to", "candidate", "--by", "lena", "--reason", "kinetics booked",
                         "--waive", "residence-time-unmeasured:assay slot in March", "--json", as_user="lena", signed=1)
    assert code == 0, err
    d = json.loads(out)
    assert d["outcome"] == "approved" and d["waivers"]["residence-time-unmeasured"]["reason"] == "assay slot in March"
    code, out, _ = cli("grade", "--compound", "K-ADV-1", "--json")
    assert json.loads(out)[0]["stage"] == "candidate"


def test_audit_verify_passes_on_an_intact_log_and_show_filters_by_compound(cli, kestrel):
    from tracker.db import queries

    cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--by", "lena", "--reason", "clean", as_user="lena", signed=1)
    cli("gate", "K-ADV-2", "--to", "candidate", "--by", "lena", "--reason", "clean", signed=1)  # another compound's events
    code, out, err = cli("audit", "verify")
    assert code == 0 and "audit chain intact" in out and "2 decision(s) match" in out and "import(s) match their rows" in out
    code, out, _ = cli("audit", "show", "--compound", "K-HIT-1", "--json")
    events = json.loads(out)
    assert [e["action"] for e in events if e["action"] != "import"] == ["gate-approved", "stage-change"]
    # the import that created it: its id lies in the summary's id ranges (one event per table, not per compound)
    kid = int(queries.compounds(kestrel).set_index("name").loc["K-HIT-1", "id"])
    created = [e for e in events if e["action"] == "import" and e["entity_type"] == "compounds"]
    assert len(created) == 1 and any(lo <= kid <= hi for lo, hi in created[0]["after"]["id_ranges"])
    code, out, _ = cli("audit", "show", "--json")
    gates = [e for e in json.loads(out) if e["action"] in ("gate-approved", "stage-change")]
    assert len(gates) == 4 and sum(e["id"] in {x["id"] for x in events} for e in gates) == 2  # K-ADV-2's are left out
    code, out, _ = cli("audit", "show", "--limit", "2")
    assert code == 0 and len(out.strip().splitlines()) == 2  # the newest two (the gate's snapshot and signature)
    code, out, _ = cli("audit", "show", "--limit", "6")
    assert code == 0 and len(out.strip().splitlines()) == 6 and "stage-change" in out


AUDIT_EDITS = {
    "at": "'2020-01-01T00:00:00.000000+00:00'",
    "actor": "'mallory'",
    "action": "'gate-refused'",
    "entity_type": "'compound'",
    "entity_id": "'999'",
    "before_json": "'{\"x\":1}'",
    "after_json": "'{\"outcome\":\"approved\"}'",
    "reason": "'nothing to see'",
    "prev_hash": "'" + "f" * 64 + "'",
    "hash": "'" + "e" * 64 + "'",
}


@pytest.mark.parametrize("field", list(AUDIT_EDITS))
def test_audit_verify_names_the_gate_event_whose_field_was_edited(cli, kestrel, field):
    code, _, err = cli("gate", "K-CAN-1", "--to", "clinical", "--by", "lena", "--reason", "ok", "--waive", "duration-mismatch",
                       "--second-lead", "otto", as_user="lena", signed=2)
    assert code == 0, err
    code, out, _ = cli("audit", "show", "--json")
    gate_event = next(e["id"] for e in json.loads(out) if e["action"] == "gate-approved")
    with kestrel.begin() as conn:
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), kestrel.dialect.name, APPEND_ONLY_TABLES)
        conn.exec_driver_sql(f"UPDATE audit_events SET {field} = {AUDIT_EDITS[field]} WHERE id = {gate_event}")
    code, out, err = cli("audit", "verify")
    assert code == 1, field
    # an edit is caught at the edited event, or (a rewritten hash) where the next event's link breaks
    assert f"event {gate_event}" in err or f"event {gate_event + 1}" in err
    code, out, _ = cli("audit", "verify", "--json")
    assert json.loads(out)["ok"] is False
