"""Bulk inserts given column by column (tracker.db.bulk) on both backends: same stored values, right ids."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import exc as sa_exc
from sqlalchemy import select

from tracker.db.bulk import insert_columns, insert_columns_ids
from tracker.db.models import Compound, Potency, Program
from tracker.db.uow import UnitOfWork

NOW = dt.datetime(2026, 3, 1, 9, 15, 2, 123456, tzinfo=dt.timezone.utc)


def _program(session, name="Bulk") -> int:
    insert_columns(session, Program.__table__, {"name": [name]}, {"created_at": NOW})
    return session.execute(select(Program.id).where(Program.name == name)).scalar_one()


def test_bulk_rows_read_back_as_the_orm_wrote_them_texts_floats_nulls_dates_and_timestamps(migrated_engine):
    texts = ["plain", "tab\there", "new\nline", "back\\slash", "µM ünïcode", "quote \" and , comma"]
    with UnitOfWork(migrated_engine) as uow:
        pid = _program(uow.session)
        ids = insert_columns_ids(uow.session, Compound.__table__,
                                 {"name": texts, "series": [None, "S1", None, "S2", "", "S3"], "stage": ["hit"] * 6},
                                 {"program_id": pid, "created_at": NOW})
        cid = ids[0]
        insert_columns(uow.session, Potency.__table__, {
            "compound_id": [cid, cid], "assay": ["a", "b"], "readout": ["KD", "IC50"], "value_M": [3.2e-9, 1e-300],
            "value_text": ["3.2 nM", None], "incubation_s": [1800.0, 0.1 + 0.2], "format": ["binding", "enzyme"],
            "measured_on": [dt.date(2026, 1, 5), None], "content_hash": ["h1", "h2"],
        }, {"created_at": NOW, "source": "x.csv"})
        uow.commit()
    with UnitOfWork(migrated_engine, write=False) as uow:
        got = uow.session.execute(select(Compound.id, Compound.name, Compound.series, Compound.created_at).order_by(Compound.id)).all()
        pot = uow.session.execute(select(Potency.value_M, Potency.value_text, Potency.incubation_s, Potency.measured_on,
                                         Potency.source, Potency.created_at).order_by(Potency.id)).all()
    assert [r.id for r in got] == ids and [r.name for r in got] == texts
    assert [r.series for r in got] == [None, "S1", None, "S2", "", "S3"]
    assert {r.created_at for r in got} == {NOW}
    assert [tuple(r) for r in pot] == [(3.2e-9, "3.2 nM", 1800.0, dt.date(2026, 1, 5), "x.csv", NOW),
                                       (1e-300, None, 0.1 + 0.2, None, "x.csv", NOW)]


def test_ids_are_returned_in_row_order_and_match_a_select_by_name(migrated_engine):
    names = [f"ORD-{i:04d}" for i in range(2500, 0, -1)]  # not in name order
    with UnitOfWork(migrated_engine) as uow:
        pid = _program(uow.session)
        insert_columns(uow.session, Compound.__table__, {"name": ["FIRST"], "stage": ["hit"]}, {"program_id": pid, "created_at": NOW})
        ids = insert_columns_ids(uow.session, Compound.__table__, {"name": names, "stage": ["hit"] * len(names)},
                                 {"program_id": pid, "created_at": NOW})
        by_name = dict(uow.session.execute(select(Compound.name, Compound.id)).all())
        uow.commit()
    assert ids == [by_name[n] for n in names]


def test_no_rows_insert_nothing_and_return_no_ids(migrated_engine):
    with UnitOfWork(migrated_engine) as uow:
        assert insert_columns(uow.session, Compound.__table__, {"name": [], "stage": []}) == 0
        assert insert_columns_ids(uow.session, Compound.__table__, {"name": [], "stage": []}) == []


def test_a_duplicate_key_in_a_bulk_insert_raises_sqlalchemys_integrity_error_and_writes_nothing(migrated_engine):
    with UnitOfWork(migrated_engine) as uow:
        pid = _program(uow.session)
        with pytest.raises(sa_exc.IntegrityError):
            insert_columns(uow.session, Compound.__table__, {"name": ["DUP", "DUP"], "stage": ["hit", "hit"]},
                           {"program_id": pid, "created_at": NOW})
    with UnitOfWork(migrated_engine, write=False) as uow:
        assert uow.session.execute(select(Compound.id)).all() == []


def test_columns_of_unequal_length_are_refused(migrated_engine):
    with UnitOfWork(migrated_engine) as uow, pytest.raises(ValueError, match="unequal length"):
        insert_columns(uow.session, Compound.__table__, {"name": ["A", "B"], "stage": ["hit"]})


@pytest.mark.parametrize("backend", ["postgresql"], indirect=True)  # SQLite serialises writers: nothing can interleave
def test_ids_are_read_back_when_another_writers_rows_interleave_on_postgresql(migrated_engine, tmp_path):
    from tracker.services.auditlog import verify
    from tracker.services.importing import import_path

    programs = tmp_path / "programs"
    programs.mkdir()
    (programs / "programs.csv").write_text("program,target\nShared,Kinase S\n", encoding="utf-8")
    import_path(migrated_engine, programs, actor="ana")  # audited: verify checks every program against its events
    other = UnitOfWork(migrated_engine).__enter__()
    try:
        # another transaction takes the next compound id and stays open
        pid = other.session.execute(select(Program.id).where(Program.name == "Shared")).scalar_one()
        other_ids = insert_columns_ids(other.session, Compound.__table__, {"name": ["OTHER-1"], "stage": ["hit"]},
                                       {"program_id": pid, "created_at": NOW})
        # in this session the ids after the visible maximum are not contiguous any more: None (read them back)
        with UnitOfWork(migrated_engine) as uow:
            assert insert_columns_ids(uow.session, Compound.__table__, {"name": ["MINE-0"], "stage": ["hit"]},
                                      {"program_id": pid, "created_at": NOW}) is None
        folder = tmp_path / "imp"
        folder.mkdir()
        (folder / "compounds.csv").write_text("compound,program,series,stage\n" + "".join(f"MINE-{i},Shared,,hit\n" for i in range(1, 6)),
                                              encoding="utf-8")
        summary = import_path(migrated_engine, folder, actor="ana")
        assert summary["tables"]["compounds"]["inserted"] == 5
    finally:
        other.rollback()
        other.__exit__(None, None, None)
    with UnitOfWork(migrated_engine, write=False) as uow:
        mine = dict(uow.session.execute(select(Compound.name, Compound.id).where(Compound.name.like("MINE-%"))).all())
    assert sorted(mine) == [f"MINE-{i}" for i in range(1, 6)] and other_ids[0] not in mine.values()
    result = verify(migrated_engine)  # the import event names exactly these rows
    assert result["ok"], result["message"]
