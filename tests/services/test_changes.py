"""krt changes: grade moves, findings, measurements, gates and actions since a date or a review pack."""

from __future__ import annotations

import datetime as dt
import html
import json

from tracker.services.actions import add_action
from tracker.services.gates import request_gate
from tracker.services.grading import grade_portfolio, set_rule_override
from tracker.services.history import PACK_META, changes
from tracker.services.importing import import_path

PASSWORD = "test-password-42"  # tests/conftest.py TEST_PASSWORD: every kestrel user's
KEYS = {"since", "grades", "findings_new", "findings_resolved", "measurements", "decisions", "actions_opened", "actions_closed"}


def test_changes_list_every_kind_of_change_since_a_moment(kestrel, tmp_path):
    t0 = dt.datetime.now(dt.timezone.utc)
    assert {k: v for k, v in changes(kestrel, t0).items() if k != "since" and v} == {}
    lo_rule = next(r for r in grade_portfolio(kestrel) if r["compound"] == "K-LO-1")["findings"][0]["rule"]
    add_action(kestrel, "K-LO-1", lo_rule, "sam", "2026-03-01", by="lena")
    set_rule_override(kestrel, "Kestrel", {"no_shift_ratio": "12", "ki_shift_threshold": "20"}, by="lena", reason="noisy assay")
    request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="clean hit", password=PASSWORD)
    (tmp_path / "potency.csv").write_text("compound,assay,readout,value,incubation,format\nK-HIT-1,KS bind,KD,250 nM,2 h,binding\n",
                                          encoding="utf-8")
    import_path(kestrel, tmp_path / "potency.csv", actor="sam")
    ch = changes(kestrel, t0)
    assert set(ch) == KEYS
    assert {"compound": "K-LO-1", "from": "moderate", "to": "clear", "direction": "down"} in ch["grades"]
    assert any(f["compound"] == "K-LO-1" and f["rule"] == lo_rule for f in ch["findings_resolved"])
    assert ch["measurements"] == [{"compound": "K-HIT-1", "table": "potency", "rows": 1}]
    assert [(d["compound"], d["to_stage"], d["outcome"]) for d in ch["decisions"]] == [("K-HIT-1", "hit-to-lead", "approved")]
    assert [a["compound"] for a in ch["actions_opened"]] == ["K-LO-1"]
    assert [(a["compound"], a["status"]) for a in ch["actions_closed"]] == [("K-LO-1", "done")]  # closed automatically
    later = changes(kestrel, dt.datetime.now(dt.timezone.utc))
    assert not any(later[k] for k in KEYS - {"since"})


def test_cli_changes_since_a_date_and_since_a_pack(cli, kestrel, tmp_path):
    code, out, err = cli("changes", "--since", "2000-01-01", "--json")
    assert code == 0 and err == ""
    ch = json.loads(out)
    assert set(ch) == KEYS and {g["direction"] for g in ch["grades"]} == {"new"} and len(ch["grades"]) == len(grade_portfolio(kestrel))
    stamp = {"created_at": dt.datetime.now(dt.timezone.utc).isoformat(), "audit_head_id": 1, "audit_head_hash": "x"}
    pack = tmp_path / "review-pack.html"
    pack.write_text(f"<html><head><meta name='{PACK_META}' content='{html.escape(json.dumps(stamp), quote=True)}'></head></html>",
                    encoding="utf-8")
    request_gate(kestrel, "K-HIT-1", "hit-to-lead", by="lena", reason="clean hit", password=PASSWORD)
    code, out, _ = cli("changes", "--since", str(pack))
    assert code == 0 and out.startswith("since review pack review-pack.html") and "gate K-HIT-1: hit -> hit-to-lead approved by lena" in out
    code, out, err = cli("changes", "--since", "last tuesday")
    assert code != 0 and out == "" and err.count("\n") == 1 and "YYYY-MM-DD" in err
    (tmp_path / "other.html").write_text("<html></html>", encoding="utf-8")
    code, out, err = cli("changes", "--since", str(tmp_path / "other.html"))
    assert code != 0 and "not a review pack" in err
