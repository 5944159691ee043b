"""A read-only database, a held lock, an unwritable backup path, a dropped audit table: one line each, never a traceback.

The CLI is run in-process (``tracker.cli.main``) on real databases of both
engines; each case must exit non-zero with exactly one ``krt: error`` line (or,
for verify, one ``FAILED`` line) and write nothing.
"""

from __future__ import annotations

import io
import sqlite3
import sys
import threading

import pytest
from sqlalchemy import text

from tracker.cli import main
from tracker.db.session import make_engine
from tracker.rules import config as rc
from tracker.services.backup import count_rows
from tracker.services.importing import import_path
from tracker.services.users import add_user

from ..conftest import TEST_PASSWORD


@pytest.fixture
def loaded(migrated_engine, sample_dir, login, monkeypatch):
    add_user(migrated_engine, "lena", "lead", password=TEST_PASSWORD)
    import_path(migrated_engine, sample_dir, actor="lena")
    login(migrated_engine, "lena")  # the writes below act as the signed-in lead
    monkeypatch.setattr(sys, "stdin", io.StringIO(TEST_PASSWORD + "\n"))  # --password-stdin: the gate's signature
    return migrated_engine


def _url(engine) -> str:
    return engine.url.render_as_string(hide_password=False)


def _one_line(capsys, *words: str) -> str:
    out = capsys.readouterr()
    lines = [ln for ln in out.err.splitlines() if ln.strip()]
    assert len(lines) == 1, out.err
    assert "Traceback" not in out.err and lines[0].startswith("krt: ")
    for w in words:
        assert w in lines[0], lines[0]
    return lines[0]


GATE = ["gate", "AGR-001", "--to", "hit-to-lead", "--reason", "ok", "--password-stdin", *sum((["--waive", r] for r in rc.RULES), [])]
WRITES = {
    "gate": GATE,
    "user": ["user", "add", "sam", "--role", "scientist", "--password-stdin"],
    "rules set": ["rules", "set", "fold_high=8", "--reason", "tighter"],
}


@pytest.fixture
def read_only_url(loaded, tmp_path):
    """The same database, reached read-only (SQLite: mode=ro URI; PostgreSQL: default_transaction_read_only)."""
    if loaded.dialect.name == "sqlite":
        yield f"sqlite:///file:{loaded.url.database}?mode=ro&uri=true"
        return
    name = loaded.url.database
    with loaded.connect() as conn:
        conn.execute(text(f'ALTER DATABASE "{name}" SET default_transaction_read_only = on'))
        conn.commit()
    loaded.dispose()
    yield _url(loaded)
    admin = make_engine(_url(loaded), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text("SET default_transaction_read_only = off"))  # this session first, then the database
            conn.execute(text(f'ALTER DATABASE "{name}" SET default_transaction_read_only = off'))
    finally:
        admin.dispose()
    loaded.dispose()


@pytest.mark.parametrize("command", list(WRITES))
def test_a_write_to_a_read_only_database_is_one_line(loaded, read_only_url, command, capsys):
    before = count_rows(loaded)
    assert main(["--database", read_only_url, *WRITES[command]]) == 2
    _one_line(capsys, "read-only")
    assert count_rows(loaded) == before


def test_a_gate_behind_a_long_lock_gives_up_in_one_line(loaded, capsys, monkeypatch):
    monkeypatch.setenv("KRT_LOCK_TIMEOUT_S", "0.3")
    holder = make_engine(_url(loaded))
    if loaded.dialect.name == "sqlite":
        conn = sqlite3.connect(loaded.url.database, isolation_level=None)
        conn.execute("BEGIN IMMEDIATE")  # another process's writer holds the write lock
    else:
        conn = holder.connect()
        conn.execute(text("SELECT id FROM compounds WHERE name = 'AGR-001' FOR UPDATE"))  # a gate's row lock, held
    try:
        done = threading.Event()
        result: list[int] = []

        def run():
            result.append(main(["--database", _url(loaded), *GATE]))
            done.set()

        t = threading.Thread(target=run)
        t.start()
        assert done.wait(120), "the gate waited for the lock without end"
        t.join()
    finally:
        conn.rollback()
        conn.close()
        holder.dispose()
    assert result == [2]
    _one_line(capsys, "locked", "nothing was written")


def test_an_unwritable_backup_path_is_one_line(loaded, tmp_path, capsys):
    if loaded.dialect.name != "sqlite":
        pytest.skip("the SQLite file backup; PostgreSQL is backed up with pg_dump or --export")
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    assert main(["--database", _url(loaded), "backup", str(blocker / "backup.sqlite")]) == 2
    _one_line(capsys, "cannot write the backup")
    assert list(tmp_path.glob("**/*.tmp")) == []


def test_an_unwritable_export_backup_folder_is_one_line(loaded, tmp_path, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    assert main(["--database", _url(loaded), "backup", "--export", str(blocker / "dir")]) == 2
    _one_line(capsys, str(blocker))


def test_verify_after_the_audit_table_was_dropped_is_one_failed_line(loaded, capsys):
    with loaded.begin() as conn:
        conn.execute(text("DROP TABLE audit_events"))
    assert main(["--database", _url(loaded), "audit", "verify"]) == 1
    _one_line(capsys, "FAILED", "audit_events table is missing")
