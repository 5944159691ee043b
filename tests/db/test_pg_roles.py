"""The PostgreSQL role set-up of the README ("Team deployment on PostgreSQL"), run on the test server.

An application role that may read and write the tracker's tables but holds no
UPDATE, DELETE or TRUNCATE privilege on ``audit_events`` and ``decisions``:
the privilege check refuses an edit before the append-only trigger is even
reached (SQLSTATE 42501 insufficient_privilege; PostgreSQL documentation,
"Privileges" and "GRANT"/"REVOKE"), while every service of the tracker still
works under that role.  The tables belong to another role (the one that runs
``krt db upgrade``), so the application cannot drop or disable the triggers
either.  Roles are cluster-wide: the test creates uniquely named ones and
drops them afterwards.
"""

from __future__ import annotations

import uuid

import pytest
from sqlalchemy import event, text
from sqlalchemy.exc import DBAPIError

from tracker.db.session import make_engine
from tracker.rules import config as rc
from tracker.services.auditlog import verify
from tracker.services.gates import request_gate
from tracker.services.importing import import_path
from tracker.services.users import add_user, end_session, session_user, start_session

PASSWORD = "test-password-42"  # tests/conftest.py TEST_PASSWORD

# Kept word for word in the README section; {app} and {owner} are krt_app and krt_owner there.
GRANTS_SQL = """
GRANT USAGE ON SCHEMA public TO {app};
GRANT SELECT, INSERT, UPDATE ON ALL TABLES IN SCHEMA public TO {app};
GRANT USAGE, SELECT ON ALL SEQUENCES IN SCHEMA public TO {app};
REVOKE UPDATE, DELETE, TRUNCATE ON audit_events, decisions, signatures FROM {app};
REVOKE UPDATE, DELETE, TRUNCATE ON audit_events, decisions, signatures FROM PUBLIC;
GRANT DELETE ON login_sessions TO {app};
ALTER DEFAULT PRIVILEGES FOR ROLE {owner} IN SCHEMA public GRANT SELECT, INSERT, UPDATE ON TABLES TO {app};
ALTER DEFAULT PRIVILEGES FOR ROLE {owner} IN SCHEMA public GRANT USAGE, SELECT ON SEQUENCES TO {app};
"""

pytestmark = pytest.mark.parametrize("backend", ["postgresql"], indirect=True)


def _statements(sql: str) -> list[str]:
    return [s.strip() for s in sql.split(";") if s.strip()]


@pytest.fixture
def app_role(migrated_engine):
    """A NOLOGIN role ``krt_app_<random>`` with the README's grants on the test database; dropped afterwards."""
    name = f"krt_app_{uuid.uuid4().hex[:10]}"
    with migrated_engine.connect() as conn:
        owner = conn.execute(text("SELECT tableowner FROM pg_tables WHERE tablename = 'audit_events'")).scalar_one()
        conn.execute(text(f"CREATE ROLE {name} NOLOGIN"))
        for stmt in _statements(GRANTS_SQL.format(app=name, owner=owner)):
            conn.execute(text(stmt))
        conn.commit()
    try:
        yield name
    finally:
        with migrated_engine.connect() as conn:
            conn.execute(text(f"DROP OWNED BY {name}"))
            conn.execute(text(f"DROP ROLE {name}"))
            conn.commit()


@pytest.fixture
def app_engine(migrated_engine, app_role):
    """An engine whose every connection acts as the application role (``SET ROLE``)."""
    engine = make_engine(migrated_engine.url.render_as_string(hide_password=False))

    @event.listens_for(engine, "connect")
    def _as_app(dbapi_connection, _record):
        with dbapi_connection.cursor() as cur:
            cur.execute(f"SET ROLE {app_role}")
        dbapi_connection.commit()

    yield engine
    engine.dispose()


def _sqlstate(engine, sql: str) -> str | None:
    with engine.connect() as conn:
        try:
            with conn.begin():
                conn.execute(text(sql))
        except DBAPIError as exc:
            return getattr(exc.orig, "sqlstate", None)
    return None


def test_the_app_role_does_every_job_of_the_tracker(app_engine, sample_dir):
    with app_engine.connect() as conn:
        assert conn.execute(text("SELECT current_user")).scalar_one().startswith("krt_app_")
    add_user(app_engine, "lena", "lead", password=PASSWORD)
    session = start_session(app_engine, "lena", PASSWORD)  # krt login
    assert session_user(app_engine, session["token"])["name"] == "lena"
    import_path(app_engine, sample_dir, actor="lena")
    approved = request_gate(app_engine, "AGR-001", "hit-to-lead", "lena", "ready", waivers=list(rc.RULES), password=PASSWORD)
    assert approved["outcome"] == "approved" and approved["signatures"]
    assert end_session(app_engine, session["token"])  # krt logout deletes the session row
    result = verify(app_engine)
    assert result["ok"], result["message"]
    assert result["head_id"] > 0


EDITS = (
    "UPDATE audit_events SET actor = 'mallory' WHERE id = 1",
    "DELETE FROM audit_events WHERE id = 1",
    "TRUNCATE audit_events",
    "UPDATE decisions SET outcome = 'approved'",
    "DELETE FROM decisions",
    "TRUNCATE decisions",
    "UPDATE signatures SET meaning = 'refused'",
    "DELETE FROM signatures",
    "ALTER TABLE audit_events DISABLE TRIGGER ALL",
    "DROP TRIGGER trg_audit_events_no_update_delete ON audit_events",
)


def test_the_app_role_is_refused_by_privilege_before_any_trigger(app_engine, sample_dir):
    add_user(app_engine, "lena", "lead", password=PASSWORD)
    import_path(app_engine, sample_dir, actor="lena")
    request_gate(app_engine, "AGR-001", "hit-to-lead", "lena", "ready", waivers=list(rc.RULES), password=PASSWORD)
    states = {sql: _sqlstate(app_engine, sql) for sql in EDITS}
    assert states == {sql: "42501" for sql in EDITS}  # insufficient_privilege (the trigger would say 23000)
    assert verify(app_engine)["ok"]


def test_the_owner_is_still_stopped_by_the_append_only_trigger(migrated_engine, app_role, sample_dir):
    import_path(migrated_engine, sample_dir, actor="lena")
    assert _sqlstate(migrated_engine, "UPDATE audit_events SET actor = 'mallory' WHERE id = 1") == "23000"


def test_tables_created_later_by_the_owner_are_granted_to_the_app_role(migrated_engine, app_role, app_engine):
    with migrated_engine.connect() as conn:
        conn.execute(text("CREATE TABLE later_revision_table (id serial PRIMARY KEY, note text)"))
        conn.commit()
    with app_engine.connect() as conn:
        conn.execute(text("INSERT INTO later_revision_table (note) VALUES ('from the app')"))
        conn.commit()
        assert conn.execute(text("SELECT count(*) FROM later_revision_table")).scalar_one() == 1
