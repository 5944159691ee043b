"""Append-only tables and the tamper-evident audit chain, on both backends."""

from __future__ import annotations

import datetime as dt
import hashlib
import threading

import pytest
from sqlalchemy import insert, select, text
from sqlalchemy.exc import DBAPIError

from tracker.db.audit import GENESIS_HASH, append_event, append_events, canonical_json, chain_head, event_hash, verify_chain
from tracker.db.models import APPEND_ONLY_TABLES, AuditEvent, Compound, Decision, Program, Signature
from tracker.db.session import with_retry
from tracker.db.triggers import drop_append_only
from tracker.db.uow import UnitOfWork


def _seed(engine, n_events: int = 5) -> None:
    now = dt.datetime.now(dt.timezone.utc)
    with UnitOfWork(engine) as uow:
        s = uow.session
        pid = s.execute(insert(Program).returning(Program.id), [{"name": "Ashgrove", "created_at": now}]).scalar_one()
        cid = s.execute(insert(Compound).returning(Compound.id), [{"name": "AGR-1", "program_id": pid, "stage": "hit", "created_at": now}]).scalar_one()
        did = s.execute(insert(Decision).returning(Decision.id), [{"compound_id": cid, "from_stage": "hit", "to_stage": "hit-to-lead",
                                                                   "outcome": "approved", "by_user": "ana", "reason": "kinetics measured",
                                                                   "at": now}]).scalar_one()
        s.execute(insert(Signature), [{"decision_id": did, "signer": "ana", "printed_name": "Ana", "role": "lead",
                                       "meaning": "approved", "at": now}])
        for i in range(n_events):
            append_event(s, "ana", "create", "compound", cid, None if i == 0 else {"stage": "hit"}, {"stage": "hit", "i": i}, f"step {i}")
        uow.commit()


def _execute(engine, sql: str) -> None:
    with engine.connect() as conn:
        conn.exec_driver_sql(sql)
        conn.commit()


@pytest.mark.parametrize("table", APPEND_ONLY_TABLES)
@pytest.mark.parametrize("statement", ["UPDATE {t} SET {c} = 'rewritten'", "DELETE FROM {t}"])
def test_the_database_refuses_to_update_or_delete_append_only_rows(migrated_engine, table, statement):
    _seed(migrated_engine)
    with pytest.raises(DBAPIError) as info:
        _execute(migrated_engine, statement.format(t=table, c="printed_name" if table == "signatures" else "reason"))
    assert "append-only" in str(info.value)
    with migrated_engine.connect() as conn:
        assert conn.exec_driver_sql(f"SELECT count(*) FROM {table}").scalar() > 0


@pytest.mark.parametrize("table", APPEND_ONLY_TABLES)
def test_postgresql_refuses_to_truncate_append_only_tables(migrated_engine, table):
    if migrated_engine.dialect.name != "postgresql":
        pytest.skip("TRUNCATE exists on PostgreSQL only")
    _seed(migrated_engine)
    with pytest.raises(DBAPIError) as info:
        _execute(migrated_engine, f"TRUNCATE {table} CASCADE")
    assert "append-only" in str(info.value)


def test_an_untouched_chain_verifies(migrated_engine):
    _seed(migrated_engine, n_events=7)
    with UnitOfWork(migrated_engine, write=False) as uow:
        ok, broken, message = verify_chain(uow.session)
        head_id, head_hash = chain_head(uow.session)
    assert (ok, broken) == (True, None), message
    assert head_id == 7 and len(head_hash) == 64


def test_an_empty_chain_verifies_with_the_genesis_head(migrated_engine):
    with UnitOfWork(migrated_engine, write=False) as uow:
        assert verify_chain(uow.session)[0] is True
        assert chain_head(uow.session) == (0, GENESIS_HASH)


def test_each_event_links_to_the_hash_of_the_one_before(migrated_engine):
    _seed(migrated_engine, n_events=3)
    with migrated_engine.connect() as conn:
        rows = conn.execute(select(AuditEvent).order_by(AuditEvent.id)).all()
    assert rows[0].prev_hash == GENESIS_HASH
    assert [r.prev_hash for r in rows[1:]] == [r.hash for r in rows[:-1]]
    assert [r.id for r in rows] == [1, 2, 3]


def test_the_event_hash_is_sha256_of_the_canonical_json():
    # SHA-256 test vector "abc" (NIST FIPS 180-2, Appendix B.1) checks the digest itself
    assert hashlib.sha256(b"abc").hexdigest() == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    fields = {"id": 1, "at": "2026-01-01T00:00:00.000000+00:00", "actor": "ana", "action": "create", "entity_type": "compound",
              "entity_id": "1", "before_json": None, "after_json": '{"a":1}', "reason": None, "prev_hash": GENESIS_HASH}
    expected = hashlib.sha256(canonical_json(fields).encode()).hexdigest()
    assert event_hash(fields) == expected
    assert canonical_json({"b": 1, "a": [1.5, None]}) == '{"a":[1.5,null],"b":1}'


MUTATIONS = {
    "at": "'2020-01-01T00:00:00.000000+00:00'",
    "actor": "'mallory'",
    "action": "'delete'",
    "entity_type": "'program'",
    "entity_id": "'999'",
    "before_json": "'{\"stage\":\"candidate\"}'",
    "after_json": "'{\"stage\":\"clinical\"}'",
    "reason": "'nothing to see'",
    "prev_hash": "'" + "f" * 64 + "'",
    "hash": "'" + "e" * 64 + "'",
    "id": "300",
}


@pytest.mark.parametrize("field", list(MUTATIONS))
def test_verify_chain_catches_an_edit_of_any_field_once_the_triggers_are_gone(migrated_engine, field):
    _seed(migrated_engine, n_events=5)
    with migrated_engine.connect() as conn:
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), migrated_engine.dialect.name, APPEND_ONLY_TABLES)
        conn.exec_driver_sql(f"UPDATE audit_events SET {field} = {MUTATIONS[field]} WHERE id = 3")
        conn.commit()
    with UnitOfWork(migrated_engine, write=False) as uow:
        ok, broken, message = verify_chain(uow.session)
    assert not ok, field
    assert broken in (3, 4, 300), (field, broken, message)
    assert "audit event" in message


def test_verify_chain_catches_a_deleted_event_in_the_middle(migrated_engine):
    _seed(migrated_engine, n_events=5)
    with migrated_engine.connect() as conn:
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), migrated_engine.dialect.name, APPEND_ONLY_TABLES)
        conn.exec_driver_sql("DELETE FROM audit_events WHERE id = 2")
        conn.commit()
    with UnitOfWork(migrated_engine, write=False) as uow:
        ok, broken, message = verify_chain(uow.session)
    assert (ok, broken) == (False, 3)
    assert "missing" in message


def test_concurrent_appends_never_fork_the_chain(migrated_engine):
    writers, per_writer = 4, 15
    errors: list[BaseException] = []

    def work(k: int) -> None:
        try:
            for i in range(per_writer):
                def once(i=i):
                    with UnitOfWork(migrated_engine) as uow:
                        append_event(uow.session, f"writer{k}", "note", "test", f"{k}-{i}", None, {"i": i}, None)
                        uow.commit()
                with_retry(once, attempts=8)
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(k,)) for k in range(writers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors
    with UnitOfWork(migrated_engine, write=False) as uow:
        ok, broken, message = verify_chain(uow.session)
        n = uow.session.execute(text("SELECT count(*) FROM audit_events")).scalar()
    assert ok, message
    assert n == writers * per_writer


def test_a_batch_append_continues_the_chain(migrated_engine):
    _seed(migrated_engine, n_events=2)
    with UnitOfWork(migrated_engine) as uow:
        stored = append_events(uow.session, [
            {"actor": "ana", "action": "import", "entity_type": "potency", "entity_id": None, "after": {"n": i}} for i in range(50)
        ])
        uow.commit()
    assert [e["id"] for e in stored] == list(range(3, 53))
    with UnitOfWork(migrated_engine, write=False) as uow:
        assert verify_chain(uow.session)[0]


def test_an_event_rolled_back_with_its_transaction_leaves_no_trace(migrated_engine):
    with UnitOfWork(migrated_engine) as uow:
        append_event(uow.session, "ana", "create", "compound", 1, None, {"x": 1}, None)
        # no commit: the unit of work rolls back
    with UnitOfWork(migrated_engine, write=False) as uow:
        assert chain_head(uow.session) == (0, GENESIS_HASH)
