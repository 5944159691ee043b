"""Actions on findings (krt action) and grade snapshots written after writes."""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import select

from tracker.db import queries
from tracker.db.models import Action, GradeSnapshot
from tracker.db.uow import UnitOfWork
from tracker.errors import InputError, PermissionDenied
from tracker.services.actions import add_action, close_action, list_actions
from tracker.services.grading import grade_portfolio, set_rule_override

CONTRACT = {"id", "compound", "rule", "owner", "due", "status", "note"}


def _rule_of(engine, compound: str) -> str:
    entry = next(r for r in grade_portfolio(engine) if r["compound"] == compound)
    assert entry["findings"], f"{compound} should have a finding in the fixture"
    return entry["findings"][0]["rule"]


def test_cli_add_list_done_drop_follow_the_contract(cli, kestrel):
    rule = _rule_of(kestrel, "K-ADV-1")
    code, out, err = cli("action", "add", "K-ADV-1", "--rule", rule, "--owner", "sam", "--due", "2020-01-31",
                         "--note", "book the SPR slot", "--by", "lena", as_user="lena")
    assert code == 0 and err == "" and "action 1 opened" in out
    code, out, _ = cli("action", "add", "K-CAN-1", "--rule", _rule_of(kestrel, "K-CAN-1"), "--owner", "lena",
                       "--due", "2999-12-31", "--by", "sam", as_user="sam")
    assert code == 0
    code, out, _ = cli("action", "list", "--json")
    rows = json.loads(out)
    assert [r["id"] for r in rows] == [1, 2] and all(CONTRACT <= set(r) for r in rows)
    assert rows[0]["compound"] == "K-ADV-1" and rows[0]["rule"] == rule
    assert rows[0]["owner"] == "sam" and rows[0]["due"] == "2020-01-31" and rows[0]["status"] == "open"
    assert rows[0]["note"] == "book the SPR slot" and rows[0]["overdue"] is True and rows[1]["overdue"] is False
    assert rows[0]["prompt"]  # the finding's prompt travels with the action
    code, out, _ = cli("action", "done", "1", "--by", "sam", as_user="sam")
    assert code == 0 and "done" in out
    with pytest.raises(SystemExit) as exc:  # dropping needs a note (argparse: required, exit 2)
        cli("action", "drop", "2", "--by", "sam", as_user="sam")
    assert exc.value.code == 2
    code, out, _ = cli("action", "drop", "2", "--note", "superseded by the PK study", "--by", "sam", as_user="sam")
    assert code == 0
    code, out, _ = cli("action", "list", "--json")
    assert json.loads(out) == []
    code, out, _ = cli("action", "list", "--all", "--json")
    assert [(r["id"], r["status"], r["note"]) for r in json.loads(out)] == [
        (1, "done", "book the SPR slot"), (2, "dropped", "superseded by the PK study")]
    events = queries.audit_events(kestrel, entity_type="action")
    assert list(events["action"]) == ["create", "create", "done", "dropped"]
    assert list(events["actor"]) == ["lena", "sam", "sam", "sam"]


@pytest.mark.parametrize("argv, message", [
    (["action", "add", "K-ADV-1", "--rule", "RULE", "--owner", "sam", "--due", "31/01/2026", "--by", "lena"], "is not a date"),
    (["action", "add", "K-ADV-1", "--rule", "RULE", "--owner", "nobody", "--due", "2026-01-31", "--by", "lena"], "not an active user"),
    (["action", "add", "K-ADV-1", "--rule", "RULE", "--owner", "sam", "--due", "2026-01-31", "--by", "vic"], "may open actions"),
    (["action", "add", "K-ADV-2", "--rule", "RULE", "--owner", "sam", "--due", "2026-01-31", "--by", "lena"], "no current finding"),
    (["action", "add", "NOPE", "--rule", "RULE", "--owner", "sam", "--due", "2026-01-31", "--by", "lena"], "no compound named"),
    (["action", "done", "99", "--by", "lena"], "no action 99"),
])
def test_bad_action_commands_fail_in_one_line_and_write_nothing(cli, kestrel, argv, message):
    argv = [a if a != "RULE" else _rule_of(kestrel, "K-ADV-1") for a in argv]
    before = len(queries.audit_events(kestrel))
    code, out, err = cli(*argv, as_user=argv[argv.index("--by") + 1])
    assert code != 0 and out == "" and err.count("\n") == 1 and message in err, err
    assert len(queries.audit_events(kestrel)) == before


def test_a_closed_action_cannot_be_closed_again(kestrel):
    a = add_action(kestrel, "K-ADV-1", _rule_of(kestrel, "K-ADV-1"), "sam", "2026-03-01", by="lena")
    close_action(kestrel, a["id"], "done", by="sam")
    with pytest.raises(InputError, match="already done"):
        close_action(kestrel, a["id"], "dropped", "changed mind", by="lena")
    with pytest.raises(PermissionDenied):
        add_action(kestrel, "K-ADV-1", _rule_of(kestrel, "K-ADV-1"), "sam", dt.date(2026, 3, 1), by="vic")


def test_an_action_whose_finding_disappears_is_closed_with_a_note_and_the_grade_change_is_snapshotted(kestrel):
    with UnitOfWork(kestrel, write=False) as uow:
        first = uow.session.execute(select(GradeSnapshot.compound_id, GradeSnapshot.grade)).all()
    assert len({cid for cid, _ in first}) == len(grade_portfolio(kestrel))  # the fixture's writes left a snapshot for every compound
    rule = _rule_of(kestrel, "K-LO-1")
    a = add_action(kestrel, "K-LO-1", rule, "sam", "2026-03-01", "re-run at 16 h", by="lena")
    # the same override that clears K-LO-1 in test_grading: its finding disappears
    set_rule_override(kestrel, "Kestrel", {"no_shift_ratio": "12", "ki_shift_threshold": "20"}, by="lena", reason="noisy assay")
    (closed,) = list_actions(kestrel, include_closed=True)
    assert closed["id"] == a["id"] and closed["status"] == "done" and closed["closed_by"] == "krt (automatic)"
    assert closed["note"].startswith("closed automatically: K-LO-1 no longer has a") and "rule settings change" in closed["note"]
    with UnitOfWork(kestrel, write=False) as uow:
        snaps = uow.session.execute(select(GradeSnapshot.grade).join_from(GradeSnapshot, Action, Action.compound_id == GradeSnapshot.compound_id)
                                    .order_by(GradeSnapshot.id)).scalars().all()
    assert snaps[-2:] == ["moderate", "clear"]
    events = queries.audit_events(kestrel, entity_type="action")
    assert list(events["action"]) == ["create", "done"] and events["actor"].iloc[-1] == "krt (automatic)"
