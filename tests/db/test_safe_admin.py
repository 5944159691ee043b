"""Administration that could lose or roll back records: ``krt db downgrade`` and ``krt restore``."""

from __future__ import annotations

import pytest
from sqlalchemy import inspect

from tracker.cli import main
from tracker.db import migrate
from tracker.db.session import make_engine
from tracker.errors import PermissionDenied
from tracker.services.admin import downgrade
from tracker.services.auditlog import head, show, verify
from tracker.services.backup import backup_sqlite, count_rows, restore_sqlite
from tracker.services.importing import import_path
from tracker.services.users import add_user

from ..conftest import TEST_PASSWORD


@pytest.fixture
def with_data(migrated_engine, sample_dir):
    add_user(migrated_engine, "lena", "lead", password=TEST_PASSWORD)
    add_user(migrated_engine, "sam", "scientist", by="lena", password=TEST_PASSWORD)
    import_path(migrated_engine, sample_dir, actor="lena")
    return migrated_engine


def _url(engine) -> str:
    return engine.url.render_as_string(hide_password=False)


def _tables(engine) -> set[str]:
    with engine.connect() as conn:
        return set(inspect(conn).get_table_names())


# ------------------------------------------------------------------ downgrade
def test_an_empty_database_downgrades_without_ceremony(migrated_engine):
    res = downgrade(migrated_engine, "base")
    assert res["backup"] is None and migrate.current(migrated_engine) is None


def test_a_database_with_data_refuses_a_downgrade_without_confirmation(with_data, capsys):
    before = count_rows(with_data)
    assert main(["--database", _url(with_data), "db", "downgrade", "base", "--by", "lena"]) == 2
    err = capsys.readouterr().err
    assert "--confirm-data-loss" in err and len(err.strip().splitlines()) == 1
    assert count_rows(with_data) == before and migrate.current(with_data) == migrate.head()


def test_a_scientist_cannot_confirm_a_downgrade(with_data, tmp_path):
    with pytest.raises(PermissionDenied, match="lead"):
        downgrade(with_data, "base", by="sam", confirm=True, backup_to=tmp_path / "bk")
    assert migrate.current(with_data) == migrate.head()
    assert not (tmp_path / "bk").exists()


def test_a_lead_confirmed_downgrade_takes_a_backup_first(with_data, tmp_path, capsys, login):
    before = count_rows(with_data)
    login(with_data, "lena")
    target = tmp_path / ("bk.sqlite" if with_data.dialect.name == "sqlite" else "bk")
    assert main(["--database", _url(with_data), "db", "downgrade", "base", "--confirm-data-loss", "--by", "lena",
                 "--backup", str(target)]) == 0
    assert "backup of the data" in capsys.readouterr().out
    assert migrate.current(with_data) is None and "compounds" not in _tables(with_data)
    if with_data.dialect.name == "sqlite":  # the whole database, audit trail included
        restored = make_engine(f"sqlite:///{tmp_path / 'back.sqlite'}")
        try:
            restore_sqlite(target, _url(restored))
            assert count_rows(restored)["compounds"] == before["compounds"]
            actions = [a for a in show(restored)["action"] if a != "checkpoint"]
            assert actions[-1] == "downgrade"  # the lead's confirmation is in the backup
            assert verify(restored)["ok"]
        finally:
            restored.dispose()
    else:  # export-based: the data, users and rule settings
        assert (target / "compounds.csv").is_file() and (target / "users.json").is_file()


# ------------------------------------------------------------------ restore behind the live head
@pytest.fixture
def live_and_old_backup(tmp_path, sample_dir):
    live = make_engine(f"sqlite:///{tmp_path / 'live.sqlite'}")
    migrate.upgrade(live)
    add_user(live, "lena", "lead", password=TEST_PASSWORD)
    add_user(live, "vic", "viewer", by="lena", password=TEST_PASSWORD)
    import_path(live, sample_dir, actor="lena")
    old = tmp_path / "old.sqlite"
    backup_sqlite(live, old)
    add_user(live, "otto", "lead", by="lena", password=TEST_PASSWORD)  # history after the backup
    yield live, old
    live.dispose()


def test_a_restore_behind_the_live_head_is_refused_unless_a_lead_forces_it(live_and_old_backup, capsys, login):
    live, old = live_and_old_backup
    login(live, "vic")
    capsys.readouterr()
    before = head(live)
    assert main(["--database", _url(live), "restore", str(old), "--force", "--by", "vic"]) == 2
    err = capsys.readouterr().err
    assert "roll history back" in err and "only a lead may force" in err and len(err.strip().splitlines()) == 1
    assert head(live) == before  # nothing replaced


def test_a_forced_roll_back_records_the_replaced_head(live_and_old_backup, capsys, login):
    live, old = live_and_old_backup
    login(live, "lena")
    capsys.readouterr()
    replaced = head(live)
    assert main(["--database", _url(live), "restore", str(old), "--force", "--by", "lena"]) == 0
    assert "rolled back" in capsys.readouterr().out
    events = show(live)
    rb = events[events["action"] == "restore-rollback"]
    assert len(rb) == 1 and replaced["head_hash"] in rb["before_json"].iloc[0] and rb["actor"].iloc[0] == "lena"
    result = verify(live)
    assert result["ok"], result["message"]
    assert not verify(live, expect_head=replaced["head_hash"])["ok"]  # the old anchor shows the roll-back too


def test_a_restore_that_loses_no_history_needs_no_lead(live_and_old_backup, tmp_path):
    live, _ = live_and_old_backup
    fresh = tmp_path / "fresh.sqlite"
    backup_sqlite(live, fresh)  # holds the live head
    res = restore_sqlite(fresh, _url(live), force=True, by="vic")
    assert res["ok"] and res["rolled_back"] is None
