"""The audit trail as people read it: names instead of row ids, a before → after diff, files by their own names."""

from __future__ import annotations

import json

import pandas as pd
from sqlalchemy import select

from tracker.services.audit_view import change_text, describe


def _events(engine) -> pd.DataFrame:
    from tracker.db.models import AuditEvent

    cols = [AuditEvent.id, AuditEvent.entity_type, AuditEvent.entity_id, AuditEvent.reason, AuditEvent.before_json,
            AuditEvent.after_json]
    with engine.connect() as conn:
        rows = conn.execute(select(*cols).order_by(AuditEvent.id)).all()
        df = pd.DataFrame.from_records(rows, columns=[c.key for c in cols])
        return describe(conn, df)


def test_events_name_programs_users_and_compounds_instead_of_row_ids(kestrel):
    df = _events(kestrel)
    labels = set(df["entity_label"])
    assert "user lena" in labels and "user sam" in labels
    assert any(label.startswith("program ") and not label.split()[-1].isdigit() for label in labels)
    by_type = dict(zip(df["entity_type"], df["entity_label"]))
    for kind, label in by_type.items():
        assert not label.rstrip().split()[-1].isdigit(), (kind, label)  # no bare database id left


def test_an_import_is_recorded_with_the_files_own_names_not_where_they_sat(kestrel, portfolio_dir):
    df = _events(kestrel)
    reasons = " ".join(r for r in df["reason"].dropna() if r.startswith("import of"))
    assert "compounds.csv" in reasons
    assert str(portfolio_dir) not in reasons


def test_a_change_reads_as_field_old_to_new():
    before = json.dumps({"stage": "hit", "series": "S1", "smiles": "CCO"})
    after = json.dumps({"stage": "lead-optimization", "series": "S1", "note": "x"})
    text = change_text(before, after).splitlines()
    assert text == ["note: x", "smiles: CCO → removed", "stage: hit → lead-optimization"]
    assert change_text(None, json.dumps({"name": "lena"})) == "name: lena"
    assert change_text(None, None) == ""
