"""Anchoring the chain (expected head, keyed HMAC checkpoints) and trusted event times, on both engines.

The attacks are the ones a holder of database rights (but not of the audit
key) can make: cut events off the end, rewrite the whole chain and re-compute
every SHA-256, append a forged event whose hash is valid, date an event in
the past.  HMAC: RFC 2104 (Krawczyk, Bellare, Canetti 1997), via Python's hmac.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import json
import os
import stat

import pytest
from sqlalchemy import insert, select

from tracker.cli import main
from tracker.db import anchor
from tracker.db import audit as audit_mod
from tracker.db.audit import append_event, event_hash
from tracker.db.models import APPEND_ONLY_TABLES, AuditEvent
from tracker.db.triggers import drop_append_only
from tracker.db.uow import UnitOfWork
from tracker.services.auditlog import head, verify

KEY = "k" * 20 + "0123456789abcdef"  # 36 characters, invented for the tests


def _write(engine, n: int = 3, actor: str = "ana") -> None:
    for i in range(n):
        with UnitOfWork(engine) as uow:
            append_event(uow.session, actor, "create", "note", str(i), None, {"i": i}, f"step {i}")
            uow.commit()


def _events(engine) -> list[dict]:
    with engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(select(AuditEvent).order_by(AuditEvent.id))]


def _replace_chain(engine, events: list[dict]) -> None:
    """Drop the triggers (as the owner could), delete every event and insert ``events`` re-hashed from the first."""
    prev = audit_mod.GENESIS_HASH
    rows = []
    for i, e in enumerate(events, start=1):
        fields = {k: e.get(k) for k in audit_mod.HASHED_FIELDS} | {"id": i, "prev_hash": prev}
        fields["hash"] = prev = event_hash(fields)
        rows.append(fields)
    with engine.begin() as conn:
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), engine.dialect.name, APPEND_ONLY_TABLES)
        conn.execute(AuditEvent.__table__.delete())
        if rows:
            conn.execute(insert(AuditEvent), rows)


def _append_forged(engine, **overrides) -> dict:
    """Insert one event with a correct chain hash, without the application (INSERT is allowed to the app role)."""
    last = _events(engine)[-1]
    fields = {"id": last["id"] + 1, "at": last["at"], "actor": "mallory", "action": "update", "entity_type": "user",
              "entity_id": "1", "before_json": None, "after_json": '{"role":"lead"}', "reason": "forged",
              "prev_hash": last["hash"]} | overrides
    fields["hash"] = event_hash(fields)
    with engine.begin() as conn:
        conn.execute(insert(AuditEvent), [fields])
    return fields


@pytest.fixture
def keyed(monkeypatch):
    monkeypatch.setenv(anchor.ENV_KEY, KEY)
    monkeypatch.delenv(anchor.ENV_KEY_FILE, raising=False)


# ------------------------------------------------------------------ head and --expect-head
def test_audit_head_json_prints_the_head_hash_and_event_count(migrated_engine, capsys):
    _write(migrated_engine, 3)
    url = migrated_engine.url.render_as_string(hide_password=False)
    assert main(["--database", url, "audit", "head", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    last = _events(migrated_engine)[-1]
    assert out["head_hash"] == last["hash"] and out["events"] == 3 == last["id"]


def test_a_cut_off_last_event_verifies_alone_but_not_against_the_expected_head(migrated_engine, capsys):
    _write(migrated_engine, 3)
    h = head(migrated_engine)["head_hash"]
    assert verify(migrated_engine, expect_head=h)["ok"]
    _replace_chain(migrated_engine, _events(migrated_engine)[:-1])  # the last event removed
    assert verify(migrated_engine)["ok"]  # the bare chain cannot see a shorter tail: that is what the anchor is for
    res = verify(migrated_engine, expect_head=h)
    assert not res["ok"] and "no longer in the chain" in res["message"]
    url = migrated_engine.url.render_as_string(hide_password=False)
    assert main(["--database", url, "audit", "verify", "--expect-head", h]) == 1
    err = capsys.readouterr().err
    assert "FAILED" in err and len(err.strip().splitlines()) == 1


def test_an_expected_head_that_is_not_a_hash_is_a_one_line_error(migrated_engine, capsys):
    url = migrated_engine.url.render_as_string(hide_password=False)
    assert main(["--database", url, "audit", "verify", "--expect-head", "abc"]) == 2
    assert "64 hex digits" in capsys.readouterr().err


def test_an_older_head_stays_valid_as_the_chain_grows(migrated_engine):
    _write(migrated_engine, 2)
    h = head(migrated_engine)["head_hash"]
    _write(migrated_engine, 2)
    res = verify(migrated_engine, expect_head=h)
    assert res["ok"] and "expected head found at event 2 (2 event(s) since)" in res["message"]


# ------------------------------------------------------------------ keyed checkpoints
def test_with_a_key_every_write_ends_with_a_checkpoint_that_verifies(migrated_engine, keyed):
    _write(migrated_engine, 3)
    events = _events(migrated_engine)
    assert [e["action"] for e in events] == ["create", "checkpoint"] * 3
    cp = json.loads(events[-1]["after_json"])
    # independent recomputation of the HMAC (RFC 2104 HMAC-SHA256 over the documented message)
    msg = f"krt-audit-checkpoint-1\n{events[-2]['id']}\n{events[-2]['hash']}".encode()
    assert cp["hmac"] == hmac.new(KEY.encode(), msg, hashlib.sha256).hexdigest() and cp["covers"] == events[-2]["id"]
    res = verify(migrated_engine)
    assert res["ok"] and res["anchored"] and "3 keyed checkpoint(s) verified" in res["message"]


def test_a_rewritten_and_rehashed_chain_is_caught_by_the_checkpoints(migrated_engine, keyed):
    _write(migrated_engine, 3)
    events = _events(migrated_engine)
    events[0]["actor"] = "mallory"  # rewrite history, then re-hash everything (the checkpoint events are kept verbatim)
    _replace_chain(migrated_engine, events)
    res = verify(migrated_engine)
    assert not res["ok"] and "no longer has the hash it anchored" in res["message"] and res["first_broken_id"] == 2


def test_a_rewritten_chain_without_its_checkpoints_is_caught(migrated_engine, keyed):
    _write(migrated_engine, 3)
    events = [e for e in _events(migrated_engine) if e["action"] != "checkpoint"]
    _replace_chain(migrated_engine, events)
    res = verify(migrated_engine)
    assert not res["ok"] and "no keyed checkpoint anchors" in res["message"]


def test_a_forged_event_with_a_valid_hash_is_caught(migrated_engine, keyed):
    _write(migrated_engine, 2)
    forged = _append_forged(migrated_engine)
    res = verify(migrated_engine)
    assert not res["ok"] and "after the last keyed checkpoint" in res["message"] and res["first_broken_id"] == forged["id"]


def test_a_forged_checkpoint_is_caught(migrated_engine, keyed):
    _write(migrated_engine, 2)
    forged = _append_forged(migrated_engine)
    after = {"covers": forged["id"], "covers_hash": forged["hash"], "key_id": anchor.key_id(KEY.encode()), "hmac": "0" * 64}
    _append_forged(migrated_engine, action="checkpoint", entity_type="audit-chain", entity_id=str(forged["id"]),
                   after_json=json.dumps(after))
    res = verify(migrated_engine)
    assert not res["ok"] and "HMAC does not match" in res["message"]


def test_a_checkpoint_made_with_another_key_is_named(migrated_engine, keyed, monkeypatch):
    _write(migrated_engine, 1)
    monkeypatch.setenv(anchor.ENV_KEY, "another-key-" + "x" * 30)
    res = verify(migrated_engine)
    assert not res["ok"] and "another audit key" in res["message"]


def test_without_a_key_verify_says_the_chain_is_not_anchored(migrated_engine, monkeypatch):
    monkeypatch.delenv(anchor.ENV_KEY, raising=False)
    monkeypatch.delenv(anchor.ENV_KEY_FILE, raising=False)
    _write(migrated_engine, 1)
    res = verify(migrated_engine)
    assert res["ok"] and not res["anchored"] and "no audit key configured" in res["checkpoints"]


def test_the_key_file_must_be_private_and_keygen_never_overwrites(tmp_path, monkeypatch, capsys):
    path = tmp_path / "keys" / "audit.key"
    assert main(["audit", "keygen", str(path)]) == 0
    assert stat.S_IMODE(path.stat().st_mode) == 0o600 and len(path.read_text().strip()) == 64
    assert main(["audit", "keygen", str(path)]) == 2
    assert "never overwritten" in capsys.readouterr().err
    monkeypatch.setenv(anchor.ENV_KEY_FILE, str(path))
    assert anchor.load_key() == path.read_text().strip().encode()
    os.chmod(path, 0o644)
    with pytest.raises(anchor.AuditKeyError, match="chmod 600"):
        anchor.load_key()
    monkeypatch.setenv(anchor.ENV_KEY_FILE, str(tmp_path / "missing.key"))
    with pytest.raises(anchor.AuditKeyError, match="cannot read"):
        anchor.load_key()


def test_a_short_key_is_refused(monkeypatch):
    monkeypatch.delenv(anchor.ENV_KEY_FILE, raising=False)
    monkeypatch.setenv(anchor.ENV_KEY, "short")
    with pytest.raises(anchor.AuditKeyError, match="at least 32"):
        anchor.load_key()


# ------------------------------------------------------------------ trusted time
def test_an_event_dated_2020_after_2026_events_is_refused_or_takes_the_server_time(migrated_engine, monkeypatch):
    _write(migrated_engine, 2)
    monkeypatch.setattr(audit_mod, "utc_stamp", lambda: "2020-01-01T00:00:00.000000+00:00")  # this machine's clock set back
    if migrated_engine.dialect.name == "sqlite":
        with pytest.raises(anchor.ClockError, match="refused to record an audit event dated 2020"):
            _write(migrated_engine, 1)
        assert len(_events(migrated_engine)) == 2  # nothing was written
    else:  # PostgreSQL: the server's clock dates the event, the client's is not asked
        _write(migrated_engine, 1)
        at = _events(migrated_engine)[-1]["at"]
        assert at.startswith(str(dt.datetime.now(dt.timezone.utc).year))


def test_an_event_earlier_than_the_last_one_is_refused_on_both_engines(migrated_engine, monkeypatch):
    _write(migrated_engine, 1)
    real = audit_mod.event_stamp
    monkeypatch.setattr(audit_mod, "event_stamp", lambda session: "2099-01-01T00:00:00.000000+00:00")
    _write(migrated_engine, 1)  # an event from the future (a clock set forward once)
    monkeypatch.setattr(audit_mod, "event_stamp", real)
    with pytest.raises(anchor.ClockError, match="may not go back in time"):
        _write(migrated_engine, 1)


def test_a_small_clock_skew_is_tolerated(migrated_engine, monkeypatch):
    _write(migrated_engine, 1)
    last = anchor.parse_at(_events(migrated_engine)[-1]["at"])
    monkeypatch.setattr(audit_mod, "event_stamp", lambda session: (last - dt.timedelta(seconds=1)).isoformat(timespec="microseconds"))
    _write(migrated_engine, 1)
    assert verify(migrated_engine)["ok"]


def test_verify_names_an_event_dated_back_in_the_chain(migrated_engine):
    _write(migrated_engine, 2)
    _append_forged(migrated_engine, at="2020-01-01T00:00:00.000000+00:00")
    res = verify(migrated_engine)
    assert not res["ok"] and "a clock was set back" in res["message"]


def test_an_export_records_the_head_it_was_taken_at(migrated_engine, sample_dir, tmp_path):
    from tracker.services.importing import export_all, import_path

    import_path(migrated_engine, sample_dir, actor="ana")
    summary = export_all(migrated_engine, tmp_path / "out")
    recorded = json.loads((tmp_path / "out" / "audit_head.json").read_text(encoding="utf-8"))
    assert recorded["head_hash"] == head(migrated_engine)["head_hash"] == summary["audit_head"]["head_hash"]
    assert verify(migrated_engine, expect_head=recorded["head_hash"])["ok"]
