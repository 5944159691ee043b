"""Backup and restore: the SQLite online copy while another process writes, and the export-based path on both backends.

The SQLite copy uses the online backup API (sqlite3_backup_*, "Online Backup
API", sqlite.org; Python's ``sqlite3.Connection.backup``), whose single-step
copy reads one snapshot, so a backup taken during writes must hold whole
imports only and a prefix of the audit chain.  The export-based restore must
give a database whose audit chain verifies and whose export equals the
original's byte for byte.
"""

from __future__ import annotations

import json
import sqlite3
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import pytest
from sqlalchemy import select

from tracker.cli import main
from tracker.db import migrate
from tracker.db.models import AuditEvent, Base, Compound, RuleConfig, User
from tracker.db.session import make_engine
from tracker.errors import PermissionDenied
from tracker.services.auditlog import verify
from tracker.services.backup import (
    BackupError,
    backup_export,
    backup_sqlite,
    count_rows,
    manifest_path,
    restore_from_export,
    restore_sqlite,
)
from tracker.services.gates import request_gate
from tracker.services.grading import grade_portfolio, set_rule_override
from tracker.services.importing import export_all, import_path
from tracker.services.users import add_user, deactivate_user

PASSWORD = "test-password-42"  # tests/conftest.py TEST_PASSWORD

HERE = Path(__file__).resolve().parent
WRITER_BATCHES = 24
WRITER_BATCH_SIZE = 8


@pytest.fixture(scope="module")
def workers():
    sys.path.insert(0, str(HERE))
    try:
        import concurrency_workers

        pool = concurrency_workers.SpawnPool(1)
        try:
            yield SimpleNamespace(mod=concurrency_workers, pool=pool)
        finally:
            pool.close()
    finally:
        sys.path.remove(str(HERE))


def _sqlite_db(path: Path):
    engine = make_engine(f"sqlite:///{path}")
    migrate.upgrade(engine)
    return engine


def _rows(engine) -> dict[str, list[tuple]]:
    out = {}
    with engine.connect() as conn:
        for table in Base.metadata.sorted_tables:
            out[table.name] = [tuple(r) for r in conn.execute(select(table).order_by(*table.primary_key.columns))]
    return out


def _files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.glob("*.csv"))}


def _populate(engine, sample_dir: Path) -> None:
    """Sample data, three users (one deactivated), a rule override and two gate decisions."""
    add_user(engine, "lena", "lead", password=PASSWORD)
    add_user(engine, "sam", "scientist", by="lena", password=PASSWORD)
    add_user(engine, "vic", "viewer", by="lena", password=PASSWORD)
    deactivate_user(engine, "vic", by="lena", reason="left the team")
    import_path(engine, sample_dir, actor="sam")
    set_rule_override(engine, "Ashgrove", {"ki_shift_threshold": 8}, by="lena", reason="assay noise")
    request_gate(engine, "AGR-001", "hit-to-lead", "lena", "meets the bar", waivers=["residence-time-unmeasured", "affinity-underestimate", "duration-mismatch"],
                 password=PASSWORD)


# ------------------------------------------------------------------ SQLite online backup
def test_a_backup_taken_while_another_process_writes_holds_whole_imports_and_a_prefix_of_the_audit_chain(tmp_path, workers):
    w = workers.mod
    src = _sqlite_db(tmp_path / "live.sqlite")
    add_user(src, "lena", "lead")
    add_user(src, "sam", "scientist", by="lena")
    (tmp_path / "p").mkdir()
    (tmp_path / "p" / "programs.csv").write_text(f"program\n{w.PROGRAM}\n", encoding="utf-8")
    import_path(src, tmp_path / "p", actor="lena")
    folders = []
    for b in range(WRITER_BATCHES):
        w.write_batch(tmp_path / f"b{b}", 0, b, WRITER_BATCH_SIZE, seed=77 + b)
        folders.append(str(tmp_path / f"b{b}"))
    started = workers.pool.manager.Event()
    [future] = workers.pool.start([(w.steady_writer, (str(src.url), folders, "sam", 0.08, started))])
    assert started.wait(120)
    during = []
    while not future.done() and len(during) < 4:
        backup = backup_sqlite(src, tmp_path / f"during-{len(during)}.sqlite")
        if not future.done():
            during.append(backup)
        time.sleep(0.15)
    report = future.result(timeout=300)
    assert report == {"imported": WRITER_BATCHES, "errors": []}
    assert during, "the writer finished before any backup was taken; lengthen it"

    final_rows = _rows(src)
    final_chain = [(r[0], r[-1]) for r in final_rows["audit_events"]]
    for k, backup in enumerate(during):
        assert backup["audit_ok"], backup["audit_message"]
        restored = restore_sqlite(backup["path"], f"sqlite:///{tmp_path / f'restored-{k}.sqlite'}")
        assert restored["ok"], restored
        eng = make_engine(f"sqlite:///{tmp_path / f'restored-{k}.sqlite'}")
        try:
            rows = _rows(eng)
        finally:
            eng.dispose()
        n_batch_compounds = sum(1 for r in rows["compounds"] if r[1].startswith("W0-"))
        assert n_batch_compounds % WRITER_BATCH_SIZE == 0  # whole imports only: a snapshot, never half a transaction
        assert len(rows["potency"]) == n_batch_compounds == len(rows["kinetic_measurements"])
        chain = [(r[0], r[-1]) for r in rows["audit_events"]]
        assert chain == final_chain[: len(chain)]  # the backup's chain is a prefix of the live one
        for table, table_rows in rows.items():  # every row the backup holds is the live row with the same key
            live = {r[0]: r for r in final_rows[table]}
            assert all(live.get(r[0]) == r for r in table_rows), table

    # after the writer stops: backup -> restore -> the same export, byte for byte
    final = backup_sqlite(src, tmp_path / "final.sqlite")
    restored = restore_sqlite(final["path"], f"sqlite:///{tmp_path / 'restored-final.sqlite'}")
    assert restored["ok"] and restored["audit"]["ok"]
    assert restored["audit"]["head_hash"] == final_chain[-1][1]
    eng = make_engine(f"sqlite:///{tmp_path / 'restored-final.sqlite'}")
    try:
        export_all(src, tmp_path / "export-live")
        export_all(eng, tmp_path / "export-restored")
        assert _rows(eng) == final_rows
    finally:
        eng.dispose()
        src.dispose()
    assert _files(tmp_path / "export-live") == _files(tmp_path / "export-restored")
    assert len(_files(tmp_path / "export-live")) == 5


def test_backup_and_restore_refuse_to_overwrite_without_force(tmp_path, sample_dir):
    src = _sqlite_db(tmp_path / "src.sqlite")
    try:
        _populate(src, sample_dir)
        first = backup_sqlite(src, tmp_path / "bk.sqlite")
        with pytest.raises(BackupError, match="exists"):
            backup_sqlite(src, tmp_path / "bk.sqlite")
        again = backup_sqlite(src, tmp_path / "bk.sqlite", force=True)
        assert again["audit_head_hash"] == first["audit_head_hash"]
        with pytest.raises(BackupError, match="already holds data"):
            restore_sqlite(tmp_path / "bk.sqlite", str(src.url))
        other = _sqlite_db(tmp_path / "other.sqlite")
        add_user(other, "olga", "lead")
        import_path(other, sample_dir, actor="olga")
        before = _rows(other)
        other.dispose()
        with pytest.raises(BackupError, match="already holds data"):
            restore_sqlite(tmp_path / "bk.sqlite", f"sqlite:///{tmp_path / 'other.sqlite'}")
        other = make_engine(f"sqlite:///{tmp_path / 'other.sqlite'}")
        assert _rows(other) == before  # refused: unchanged
        other.dispose()
        # the backup does not hold other's audit head: replacing it rolls other's history back, which only its lead may force
        with pytest.raises(PermissionDenied, match="roll history back"):
            restore_sqlite(tmp_path / "bk.sqlite", f"sqlite:///{tmp_path / 'other.sqlite'}", force=True)
        forced = restore_sqlite(tmp_path / "bk.sqlite", f"sqlite:///{tmp_path / 'other.sqlite'}", force=True, by="olga")
        assert forced["ok"] and forced["rolled_back"]["by"] == "olga"
        other = make_engine(f"sqlite:///{tmp_path / 'other.sqlite'}")
        mine, theirs = _rows(other), _rows(src)
        assert {t: r for t, r in mine.items() if t != "audit_events"} == {t: r for t, r in theirs.items() if t != "audit_events"}
        assert mine["audit_events"][: len(theirs["audit_events"])] == theirs["audit_events"]  # plus the restore-rollback event
        other.dispose()
    finally:
        src.dispose()


def test_a_backup_file_changed_after_it_was_written_is_refused(tmp_path, sample_dir):
    src = _sqlite_db(tmp_path / "src.sqlite")
    try:
        _populate(src, sample_dir)
        backup = backup_sqlite(src, tmp_path / "bk.sqlite")
    finally:
        src.dispose()
    con = sqlite3.connect(backup["path"])
    con.execute("DROP TRIGGER trg_audit_events_no_update")
    con.execute("UPDATE audit_events SET actor = 'mallory' WHERE id = 2")
    con.commit()
    con.close()
    with pytest.raises(BackupError, match="does not match its manifest"):
        restore_sqlite(backup["path"], f"sqlite:///{tmp_path / 'r.sqlite'}")
    assert not (tmp_path / "r.sqlite").exists()
    # without the manifest the edit is still caught: the restored chain does not verify
    manifest_path(backup["path"]).unlink()
    result = restore_sqlite(backup["path"], f"sqlite:///{tmp_path / 'r.sqlite'}")
    assert not result["ok"] and result["audit"]["first_broken_id"] == 2


def test_krt_backup_and_restore_on_the_command_line(tmp_path, sample_dir, capsys):
    src = _sqlite_db(tmp_path / "src.sqlite")
    try:
        _populate(src, sample_dir)
    finally:
        src.dispose()
    url = f"sqlite:///{tmp_path / 'src.sqlite'}"
    assert main(["--database", url, "backup", str(tmp_path / "bk.sqlite")]) == 0
    out = capsys.readouterr().out
    assert "backup" in out and "audit head" in out
    manifest = json.loads(manifest_path(tmp_path / "bk.sqlite").read_text())
    assert manifest["audit_ok"] and manifest["tables"]["compounds"] == 4
    assert main(["restore", str(tmp_path / "bk.sqlite"), "--to", f"sqlite:///{tmp_path / 'new.sqlite'}"]) == 0
    assert "audit verify: ok" in capsys.readouterr().out
    assert main(["restore", str(tmp_path / "bk.sqlite"), "--to", f"sqlite:///{tmp_path / 'new.sqlite'}"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "already holds data" in err[0] and "--force" in err[0]
    assert main(["--database", f"sqlite:///{tmp_path / 'new.sqlite'}", "audit", "verify"]) == 0


@pytest.mark.parametrize("backend", ["postgresql"], indirect=True)
def test_krt_backup_of_a_postgresql_database_points_to_pg_dump_in_one_line(migrated_engine, capsys):
    url = migrated_engine.url.render_as_string(hide_password=False)
    assert main(["--database", url, "backup", "somewhere.sqlite"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pg_dump" in err[0] and "--export" in err[0]
    assert not Path("somewhere.sqlite").exists()


# ------------------------------------------------------------------ export-based, both backends
def test_an_export_based_restore_verifies_and_exports_the_same_files_with_users_rules_and_grades(
        migrated_engine, second_migrated_engine, sample_dir, tmp_path):
    _populate(migrated_engine, sample_dir)
    m = backup_export(migrated_engine, tmp_path / "bk")
    assert m["users"] == 3 and m["rule_configs"] == 1
    res = restore_from_export(tmp_path / "bk", second_migrated_engine, actor="restorer")
    assert res["audit"]["ok"], res["audit"]["message"]
    export_all(migrated_engine, tmp_path / "a")
    export_all(second_migrated_engine, tmp_path / "b")
    assert _files(tmp_path / "a") == _files(tmp_path / "b")
    assert len(_files(tmp_path / "a")) == 5

    def users(engine):
        with engine.connect() as conn:
            return sorted(conn.execute(select(User.name, User.role, User.active)).all())

    def rules(engine):
        with engine.connect() as conn:
            return conn.execute(select(RuleConfig.version, RuleConfig.config_json).order_by(RuleConfig.id)).all()

    assert users(second_migrated_engine) == users(migrated_engine) == [("lena", "lead", True), ("sam", "scientist", True), ("vic", "viewer", False)]
    assert rules(second_migrated_engine) == rules(migrated_engine)
    graded = {g["compound"]: (g["grade"], sorted(f["rule"] for f in g["findings"])) for g in grade_portfolio(migrated_engine)}
    assert {g["compound"]: (g["grade"], sorted(f["rule"] for f in g["findings"])) for g in grade_portfolio(second_migrated_engine)} == graded
    # documented: the new trail starts with the restore and names the old chain head
    with second_migrated_engine.connect() as conn:
        last = conn.execute(select(AuditEvent.actor, AuditEvent.action, AuditEvent.after_json).order_by(AuditEvent.id.desc()).limit(1)).one()
        stages = dict(conn.execute(select(Compound.name, Compound.stage)).all())
    assert last.actor == "restorer" and last.action == "restore"
    assert json.loads(last.after_json)["manifest"]["audit_head_hash"] == m["audit_head_hash"]
    assert stages["AGR-001"] == "hit-to-lead"  # the current stage travels; the decision that set it does not
    counts = count_rows(second_migrated_engine)
    assert counts["decisions"] == 0 and count_rows(migrated_engine)["decisions"] == 1


def test_an_export_based_restore_refuses_a_changed_file_or_a_database_with_data(migrated_engine, second_migrated_engine, sample_dir, tmp_path):
    _populate(migrated_engine, sample_dir)
    backup_export(migrated_engine, tmp_path / "bk")
    with pytest.raises(BackupError, match="already holds data"):
        restore_from_export(tmp_path / "bk", migrated_engine, actor="restorer")
    potency = tmp_path / "bk" / "potency.csv"
    potency.write_text(potency.read_text().replace("3.2 nM", "32 nM"))
    with pytest.raises(BackupError, match="does not match the manifest"):
        restore_from_export(tmp_path / "bk", second_migrated_engine, actor="restorer")
    assert not any(count_rows(second_migrated_engine).values())
    assert verify(second_migrated_engine)["ok"]


def test_krt_backup_export_and_restore_from_export_on_the_command_line(migrated_engine, second_migrated_engine, sample_dir, tmp_path, capsys):
    _populate(migrated_engine, sample_dir)
    src = migrated_engine.url.render_as_string(hide_password=False)
    dst = second_migrated_engine.url.render_as_string(hide_password=False)
    assert main(["--database", src, "backup", "--export", str(tmp_path / "bk")]) == 0
    assert "not included: audit_events" in capsys.readouterr().out
    assert main(["restore", "--from-export", str(tmp_path / "bk"), "--to", dst, "--by", "restorer"]) == 0
    out = capsys.readouterr().out
    assert "3 user(s), 1 rule setting(s)" in out and "audit verify: ok" in out
    assert main(["restore", "--from-export", str(tmp_path / "bk"), "--to", dst, "--by", "restorer"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "already holds data" in err[0]
