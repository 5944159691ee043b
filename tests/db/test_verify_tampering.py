"""``krt audit verify`` names every edit of decision-driving data made with database rights outside the application.

Each case is run on SQLite and PostgreSQL: a portfolio is imported, users are
added, one gate is approved and one refused, a rule setting is stored; then
the data is changed with plain SQL, as someone holding the application's
database login could, and :func:`tracker.services.auditlog.verify` must fail
with a message naming the table (or record) that changed.  Where an
append-only trigger would refuse the SQL (decisions), the trigger is dropped
first, as the table's owner could (the triggers are a second line, not the
only one).
"""

from __future__ import annotations

import pytest
from sqlalchemy import text

from tracker.db.models import APPEND_ONLY_TABLES
from tracker.db.triggers import drop_append_only
from tracker.errors import GateRefused
from tracker.rules import config as rc
from tracker.services.auditlog import verify
from tracker.services.gates import request_gate
from tracker.services.grading import set_rule_override
from tracker.services.importing import import_path
from tracker.services.users import add_user

from ..conftest import TEST_PASSWORD


@pytest.fixture
def portfolio(migrated_engine, sample_dir):
    add_user(migrated_engine, "lena", "lead", password=TEST_PASSWORD)
    add_user(migrated_engine, "sam", "scientist", by="lena", password=TEST_PASSWORD)
    add_user(migrated_engine, "vic", "viewer", by="lena", password=TEST_PASSWORD)
    import_path(migrated_engine, sample_dir, actor="lena")
    request_gate(migrated_engine, "AGR-001", "hit-to-lead", by="lena", reason="kinetics in hand", waivers=list(rc.RULES),
                 password=TEST_PASSWORD)
    with pytest.raises(GateRefused):
        request_gate(migrated_engine, "AGR-003", "clinical", by="vic", reason="push it through", password=TEST_PASSWORD)
    set_rule_override(migrated_engine, None, {"fold_high": 8.0}, by="lena", reason="tighter")
    result = verify(migrated_engine)
    assert result["ok"], result["message"]
    return migrated_engine


def _sql(engine, *statements: str, drop_triggers: bool = False) -> None:
    with engine.begin() as conn:
        if drop_triggers:
            drop_append_only(lambda sql: conn.exec_driver_sql(sql), engine.dialect.name, APPEND_ONLY_TABLES)
        for sql in statements:
            conn.exec_driver_sql(sql)


def _fails(engine, *words: str) -> str:
    result = verify(engine)
    assert not result["ok"], "verify passed over a tampered database"
    for w in words:
        assert w in result["message"], result["message"]
    assert "\n" not in result["message"]
    return result["message"]


def test_a_stage_set_by_hand_on_a_gated_compound_is_named(portfolio):
    _sql(portfolio, "UPDATE compounds SET stage = 'clinical' WHERE name = 'AGR-001'")
    _fails(portfolio, "compound AGR-001", "stage is 'clinical'", "last approved decision")


def test_a_stage_set_by_hand_on_a_never_gated_compound_breaks_its_import_seal(portfolio):
    _sql(portfolio, "UPDATE compounds SET stage = 'clinical' WHERE name = 'BKF-001'")
    _fails(portfolio, "compound BKF-001", "stage is 'clinical'", "creation row says 'hit-to-lead'")
    assert any("compounds rows it imported no longer match" in p for p in verify(portfolio)["problems"])


def test_a_stage_and_its_history_both_set_by_hand_still_break_the_import_seal(portfolio):
    _sql(portfolio, "UPDATE compounds SET stage = 'clinical' WHERE name = 'BKF-001'",
         "UPDATE stage_history SET to_stage = 'clinical' WHERE compound_id = (SELECT id FROM compounds WHERE name = 'BKF-001')")
    _fails(portfolio, "compounds rows it imported no longer match")


def test_an_edited_potency_value_is_named(portfolio):
    _sql(portfolio, "UPDATE potency SET \"value_M\" = \"value_M\" * 100 WHERE id = (SELECT min(id) FROM potency)")
    _fails(portfolio, "potency rows it imported no longer match", "edited")


def test_an_edited_potency_text_is_named_too(portfolio):
    _sql(portfolio, "UPDATE potency SET value_text = '320 nM' WHERE id = (SELECT min(id) FROM potency)")
    _fails(portfolio, "potency rows it imported")


def test_an_inserted_kinetics_row_is_named(portfolio):
    _sql(portfolio, "INSERT INTO kinetic_measurements (compound_id, method, koff_per_s, koff_given_as, content_hash, created_at) "
                    "SELECT id, 'spr', 1e-5, 'koff', 'forged', created_at FROM compounds WHERE name = 'AGR-003'")
    _fails(portfolio, "kinetic_measurements row", "AGR-003", "no audited import or fit")


def test_a_deleted_kinetics_row_is_named(portfolio):
    _sql(portfolio, "DELETE FROM kinetic_measurements WHERE id = (SELECT max(id) FROM kinetic_measurements)")
    _fails(portfolio, "kinetic_measurements rows it imported", "removed")


@pytest.mark.parametrize("statement, words", [
    ("UPDATE stage_history SET to_stage = 'candidate' WHERE decision_id IS NOT NULL", ("stage_history row", "to_stage")),
    ("UPDATE stage_history SET by_user = 'vic' WHERE decision_id IS NOT NULL", ("stage_history row", "by_user")),
    ("UPDATE stage_history SET to_stage = 'candidate' WHERE decision_id IS NULL "
     "AND compound_id = (SELECT id FROM compounds WHERE name = 'BKF-001')", ("stage_history", "BKF-001")),
    ("DELETE FROM stage_history WHERE decision_id IS NOT NULL", ("has no stage_history row",)),
])
def test_an_edited_stage_history_is_named(portfolio, statement, words):
    _sql(portfolio, statement)
    _fails(portfolio, *words)


def test_an_edited_rule_setting_is_named(portfolio):
    _sql(portfolio, "UPDATE rule_configs SET config_json = '{\"fold_high\": 1000.0}'")
    _fails(portfolio, "rule_configs row", "rule settings edited")


def test_an_inserted_rule_setting_is_named(portfolio):
    _sql(portfolio, "INSERT INTO rule_configs (program_id, version, config_json, created_at) "
                    "SELECT NULL, 9, '{\"fold_high\": 1000.0}', created_at FROM rule_configs")
    _fails(portfolio, "rule_configs row", "no audited rule change")


def test_a_raised_user_role_is_named(portfolio):
    _sql(portfolio, "UPDATE users SET role = 'lead' WHERE name = 'vic'")
    _fails(portfolio, "user vic", "role is 'lead'", "users.role")


def test_a_user_added_by_hand_is_named(portfolio):
    _sql(portfolio, "INSERT INTO users (name, role, active, created_at) SELECT 'mallory', 'lead', active, created_at FROM users "
                    "WHERE name = 'lena'")
    _fails(portfolio, "user mallory", "no audited user change")


def test_a_deleted_refused_decision_is_named(portfolio):
    _sql(portfolio, "DELETE FROM signatures WHERE decision_id IN (SELECT id FROM decisions WHERE outcome = 'refused')",
         "DELETE FROM decisions WHERE outcome = 'refused'", drop_triggers=True)
    _fails(portfolio, "gate-refused", "missing from the decisions table")


def test_an_edited_program_threshold_is_named(portfolio):
    _sql(portfolio, "UPDATE programs SET engagement_threshold = 0.1 WHERE name = 'Ashgrove'")
    _fails(portfolio, "program Ashgrove", "engagement_threshold")


def test_the_intact_portfolio_reports_what_it_checked(portfolio):
    result = verify(portfolio)
    assert "4 import(s) match their rows" in result["message"] and "2 decision(s) match" in result["message"]
    assert result["events"] == result["head_id"] > 0 and result["problems"] == []


def test_edits_of_saved_fits_are_named(migrated_engine):
    from tracker.services.demo import load_demo

    load_demo(migrated_engine)  # imports the demo portfolio and saves its fits (time course + kinetics row, each sealed)
    assert verify(migrated_engine)["ok"]
    with migrated_engine.begin() as conn:
        km = conn.execute(text("SELECT min(id) FROM kinetic_measurements WHERE time_course_id IS NOT NULL")).scalar_one()
        tc = conn.execute(text("SELECT min(id) FROM time_courses")).scalar_one()
        conn.execute(text("UPDATE kinetic_measurements SET koff_per_s = koff_per_s / 10 WHERE id = :i"), {"i": km})
        conn.execute(text("UPDATE time_courses SET data_json = '{}' WHERE id = :i"), {"i": tc})
    result = verify(migrated_engine)
    assert not result["ok"]
    problems = " | ".join(result["problems"])
    assert f"kinetic_measurements row {km} no longer matches" in problems and f"time_courses row {tc} no longer matches" in problems
