"""Read-only views: one query each, DataFrames with SI columns."""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import event, insert, select

from tracker.db import queries
from tracker.db.models import Compound, TimeCourse
from tracker.db.uow import UnitOfWork
from tracker.errors import NotFoundError
from tracker.services.importing import import_path


@pytest.fixture
def loaded(migrated_engine, sample_dir):
    import_path(migrated_engine, sample_dir, actor="ana")
    return migrated_engine


def test_compounds_carry_their_program_name(loaded):
    df = queries.compounds(loaded)
    assert dict(zip(df["name"], df["program"])) == {"AGR-001": "Ashgrove", "AGR-002": "Ashgrove", "AGR-003": "Ashgrove", "BKF-001": "Brackenfold"}
    assert list(queries.compounds(loaded, program="Brackenfold")["name"]) == ["BKF-001"]
    assert list(queries.compounds(loaded, stage="candidate")["name"]) == ["AGR-003"]


def test_latest_kinetics_keeps_the_most_recent_measurement_per_compound(loaded):
    all_rows = queries.kinetics(loaded)
    assert len(all_rows) == 4
    latest = queries.kinetics(loaded, latest=True).set_index("compound")
    assert sorted(latest.index) == ["AGR-001", "AGR-002", "AGR-003"]
    assert latest.loc["AGR-003", "koff_text"] == "60 min"  # 2026-03-01 beats 2026-02-01
    # residence time = 1/koff (Copeland, Pompliano & Meek 2006, Nat Rev Drug Discov 5:730)
    assert latest.loc["AGR-003", "residence_time_s"] == pytest.approx(3600.0)
    assert latest.loc["AGR-001", "kd_from_rates_M"] == pytest.approx(1e-3 / 1e6)  # KD = koff/kon


def test_float_columns_are_float_even_when_all_missing(loaded):
    df = queries.potency(loaded)
    assert str(df["tracer_kd_M"].dtype) == "float64"
    assert str(queries.pk(loaded)["dosing_interval_s"].dtype) == "float64"
    assert str(queries.potency(loaded, compounds=["nobody"])["value_M"].dtype) == "float64"


def test_each_view_is_one_query(loaded):
    statements = []

    def count(conn, cursor, statement, parameters, context, executemany):
        if not statement.lstrip().upper().startswith(("BEGIN", "PRAGMA", "SELECT 1")):
            statements.append(statement)

    event.listen(loaded, "before_cursor_execute", count)
    try:
        for fn in (queries.programs, queries.compounds, queries.potency, queries.pk, queries.users, queries.table_counts):
            statements.clear()
            fn(loaded)
            assert len(statements) == 1, (fn.__name__, statements)
        statements.clear()
        queries.kinetics(loaded, latest=True)
        assert len(statements) == 1
    finally:
        event.remove(loaded, "before_cursor_execute", count)


def test_counts_cover_every_table_and_saved_fits(loaded):
    counts = queries.counts(loaded)
    assert counts["programs"] == 2 and counts["compounds"] == 4 and counts["potency"] == 4
    assert counts["kinetic_measurements"] == 4 and counts["pk_profiles"] == 3 and counts["saved_fits"] == 0
    assert counts["audit_events"] > 0


def test_a_time_course_comes_back_as_its_columns_with_meta(loaded):
    data = {"time_s": [0, 60, 120], "signal": [0.0, 0.4, 0.6], "concentration_M": [1e-9] * 3, "curve": [0, 0, 0]}
    with UnitOfWork(loaded) as uow:
        cid = uow.session.execute(select(Compound.id).where(Compound.name == "AGR-001")).scalar_one()
        tid = uow.session.execute(insert(TimeCourse).returning(TimeCourse.id), [{
            "compound_id": cid, "method": "association-dissociation", "data_json": json.dumps(data),
            "meta_json": json.dumps({"file": "run1.csv"}), "content_hash": "h1", "created_at": dt.datetime.now(dt.timezone.utc),
        }]).scalar_one()
        uow.commit()
    df = queries.time_course(loaded, tid)
    assert list(df.columns) == ["time_s", "signal", "concentration_M", "curve"]
    assert df["signal"].tolist() == [0.0, 0.4, 0.6]
    assert df.attrs["compound"] == "AGR-001" and df.attrs["meta"] == {"file": "run1.csv"}
    assert list(queries.time_courses(loaded)["id"]) == [tid]
    with pytest.raises(NotFoundError):
        queries.time_course(loaded, tid + 100)


def test_audit_events_can_be_filtered(loaded):
    all_events = queries.audit_events(loaded)
    programs = queries.audit_events(loaded, entity_type="program")
    assert len(programs) == 2 and set(programs["action"]) == {"create"}
    compounds = queries.audit_events(loaded, entity_type="compounds")  # one import summary for the 4 compounds
    assert len(compounds) == 1 and set(compounds["action"]) == {"import"}
    assert len(queries.audit_events(loaded, actor="nobody")) == 0
    assert len(queries.audit_events(loaded, limit=2, newest_first=True)) == 2
    assert queries.audit_events(loaded, limit=1, newest_first=True)["id"].iloc[0] == all_events["id"].max()
    first_at = all_events["at"].iloc[0]
    assert len(queries.audit_events(loaded, since=first_at)) == len(all_events)
    assert len(queries.audit_events(loaded, until="2000-01-01")) == 0


def test_queries_read_inside_a_callers_transaction(loaded):
    with UnitOfWork(loaded) as uow:
        uow.session.execute(insert(Compound), [{"name": "TMP-1", "program_id": 1, "stage": "hit", "created_at": dt.datetime.now(dt.timezone.utc)}])
        assert "TMP-1" in set(queries.compounds(uow.session)["name"])
    assert "TMP-1" not in set(queries.compounds(loaded)["name"])
