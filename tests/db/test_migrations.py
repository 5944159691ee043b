"""Alembic migrations: round trip on both backends, and models that match them."""

from __future__ import annotations

from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import Column, Float, MetaData, inspect

from tracker.db import migrate
from tracker.db.models import APPEND_ONLY_TABLES, Base

EXPECTED_TABLES = {
    "programs", "compounds", "stage_history", "potency", "kinetic_measurements", "time_courses",
    "pk_profiles", "users", "rule_configs", "decisions", "audit_events", "login_sessions", "signatures", "actions", "grade_snapshots",
}


def _tables(engine) -> set[str]:
    return set(inspect(engine).get_table_names()) - {"alembic_version"}


def _trigger_names(engine) -> set[str]:
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            rows = conn.exec_driver_sql("SELECT name FROM sqlite_master WHERE type='trigger'").all()
        else:
            rows = conn.exec_driver_sql("SELECT tgname FROM pg_trigger WHERE NOT tgisinternal").all()
    return {r[0] for r in rows}


def test_upgrade_then_downgrade_then_upgrade_again_leaves_the_full_schema(engine):
    assert migrate.current(engine) is None
    assert migrate.upgrade(engine) == migrate.head()
    assert _tables(engine) == EXPECTED_TABLES
    assert migrate.downgrade(engine, "base") is None
    assert _tables(engine) == set()
    assert _trigger_names(engine) == set()
    assert migrate.upgrade(engine) == migrate.head()
    assert _tables(engine) == EXPECTED_TABLES


def test_upgrade_creates_the_append_only_triggers(migrated_engine):
    names = _trigger_names(migrated_engine)
    for table in APPEND_ONLY_TABLES:
        assert any(table in n for n in names), (table, names)


def test_models_match_the_migrations(migrated_engine):
    assert migrate.check_models_match(migrated_engine) == []


def test_a_model_change_without_a_migration_is_detected(migrated_engine):
    # the same comparison as check_models_match, on metadata with one extra column
    changed = MetaData(naming_convention=Base.metadata.naming_convention)
    for table in Base.metadata.sorted_tables:
        table.to_metadata(changed)
    changed.tables["potency"].append_column(Column("hill_slope", Float, nullable=True))
    with migrated_engine.connect() as conn:
        diffs = compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}), changed)
    assert any(d[0] == "add_column" and d[3].name == "hill_slope" for d in diffs)


def test_upgrading_an_up_to_date_database_changes_nothing(migrated_engine, db_snapshot):
    before = db_snapshot(migrated_engine)
    assert migrate.upgrade(migrated_engine) == migrate.head()
    assert db_snapshot(migrated_engine) == before


def test_require_current_names_the_fix_for_an_empty_database(engine):
    with pytest.raises(Exception) as info:
        migrate.require_current(engine)
    assert "krt db upgrade" in str(info.value)


def test_migration_scripts_are_found_in_the_source_checkout():
    location = Path(migrate.script_location())
    assert (location / "env.py").is_file()
    assert (location / "script.py.mako").is_file()
    assert any(p.name.endswith(".py") and p.name != "__init__.py" for p in (location / "versions").iterdir())


def test_sqlite_foreign_keys_are_back_on_after_a_migration(tmp_path):
    from tracker.db.session import make_engine

    eng = make_engine(f"sqlite:///{tmp_path / 'fk.sqlite'}")
    try:
        migrate.upgrade(eng)
        with eng.connect() as conn:
            assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
    finally:
        eng.dispose()


def test_the_quick_head_and_stamp_readers_agree_with_alembic(migrated_engine):
    # the start-up path reads the scripts and the stamp without Alembic; Alembic itself is the reference
    from tracker.db import migrate

    assert migrate.scripted_head() == migrate.head()
    assert migrate.stamped(migrated_engine) == migrate.current(migrated_engine) == migrate.head()


def test_the_quick_stamp_reader_sees_an_empty_database(tmp_path):
    from tracker.db import migrate
    from tracker.db.session import make_engine

    engine = make_engine(f"sqlite:///{tmp_path / 'empty.sqlite'}")
    try:
        assert migrate.stamped(engine) is None
    finally:
        engine.dispose()
