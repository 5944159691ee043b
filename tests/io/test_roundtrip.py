"""Import -> export -> import -> export is lossless, for CSV folders and for workbooks."""

from __future__ import annotations

import filecmp

import pytest

import pandas as pd

from tracker.db import queries
from tracker.services.importing import export_all, import_path

# what a round trip must carry over (ids, timestamps and hashes of the new database may differ)
VOLATILE = {"id", "created_at", "compound_id", "program_id", "time_course_id", "at", "note"}  # note: import provenance


def _content(engine) -> dict[str, pd.DataFrame]:
    frames = {
        "programs": queries.programs(engine),
        "compounds": queries.compounds(engine),
        "potency": queries.potency(engine),
        "kinetics": queries.kinetics(engine),
        "pk": queries.pk(engine),
        "stage_history": queries.stage_history(engine),
    }
    return {k: df.drop(columns=[c for c in df.columns if c in VOLATILE]).reset_index(drop=True) for k, df in frames.items()}


def test_csv_round_trip_gives_identical_files_and_equal_contents(migrated_engine, second_migrated_engine, sample_dir, tmp_path):
    import_path(migrated_engine, sample_dir, actor="ana")
    first = tmp_path / "export1"
    export_all(migrated_engine, first)
    import_path(second_migrated_engine, first, actor="ana")
    second = tmp_path / "export2"
    export_all(second_migrated_engine, second)
    names = sorted(p.name for p in first.iterdir() if p.suffix == ".csv")
    assert names == ["compounds.csv", "kinetics.csv", "pk.csv", "potency.csv", "programs.csv"]
    assert (first / "audit_head.json").is_file()  # the audit head the export was taken at (differs per database)
    match, mismatch, errors = filecmp.cmpfiles(first, second, names, shallow=False)
    assert mismatch == [] and errors == []
    a, b = _content(migrated_engine), _content(second_migrated_engine)
    for table in a:
        pd.testing.assert_frame_equal(a[table], b[table], obj=table)


def test_export_writes_quantities_back_as_the_text_they_arrived_with(migrated_engine, sample_dir, tmp_path):
    import_path(migrated_engine, sample_dir)
    export_all(migrated_engine, tmp_path / "out")
    potency = (tmp_path / "out" / "potency.csv").read_text(encoding="utf-8")
    assert "12 µM" in potency and "0.45 nM" in potency and "8e-9 M" in potency
    kinetics = (tmp_path / "out" / "kinetics.csv").read_text(encoding="utf-8")
    assert "AGR-002,jump-dilution,,,3 h," in kinetics  # residence time stays a residence time
    assert "0.06 /nM/min" in kinetics


def test_workbook_round_trip_matches_the_csv_export(migrated_engine, second_migrated_engine, sample_dir, tmp_path):
    import_path(migrated_engine, sample_dir)
    book = tmp_path / "all.xlsx"
    export_all(migrated_engine, tmp_path / "csv1", xlsx=book)
    import_path(second_migrated_engine, book)
    export_all(second_migrated_engine, tmp_path / "csv2")
    names = sorted(p.name for p in (tmp_path / "csv1").iterdir() if p.suffix == ".csv")
    match, mismatch, errors = filecmp.cmpfiles(tmp_path / "csv1", tmp_path / "csv2", names, shallow=False)
    assert (mismatch, errors) == ([], [])


def test_importing_an_export_into_the_same_database_adds_nothing(migrated_engine, sample_dir, tmp_path, db_snapshot):
    import_path(migrated_engine, sample_dir)
    export_all(migrated_engine, tmp_path / "out")
    before = db_snapshot(migrated_engine)
    import_path(migrated_engine, tmp_path / "out")
    assert db_snapshot(migrated_engine) == before


def test_an_empty_database_exports_header_only_files_that_import_cleanly(migrated_engine, tmp_path):
    summary = export_all(migrated_engine, tmp_path / "empty")
    assert all(t["rows"] == 0 for t in summary["tables"].values())
    assert (tmp_path / "empty" / "pk.csv").read_text() == "compound,species,route,half_life,free_cmax,tmax,dosing_interval,source\n"
    assert import_path(migrated_engine, tmp_path / "empty")["audit_events"] == 0


def test_a_value_stored_without_its_text_is_exported_in_si(migrated_engine, sample_dir, tmp_path):
    import datetime as dt

    from sqlalchemy import insert, select

    from tracker.db.models import Compound, KineticMeasurement
    from tracker.db.uow import UnitOfWork

    import_path(migrated_engine, sample_dir)
    with UnitOfWork(migrated_engine) as uow:
        cid = uow.session.execute(select(Compound.id).where(Compound.name == "BKF-001")).scalar_one()
        uow.session.execute(insert(KineticMeasurement), [{
            "compound_id": cid, "method": "competition-kinetics", "kon_per_M_s": 2.5e6, "koff_per_s": 4e-4,
            "koff_given_as": "koff", "fit_json": "{}", "content_hash": "fit-1", "created_at": dt.datetime.now(dt.timezone.utc),
        }])
        uow.commit()
    export_all(migrated_engine, tmp_path / "out")
    line = [l for l in (tmp_path / "out" / "kinetics.csv").read_text().splitlines() if l.startswith("BKF-001")][0]
    assert line.startswith("BKF-001,competition-kinetics,2500000.0 /M/s,0.0004 /s,")
    assert queries.counts(migrated_engine)["kinetic_measurements"] >= 1


def test_assay_conditions_round_trip_in_their_own_units_and_leave_older_rows_hashes_alone(migrated_engine, second_migrated_engine,
                                                                                            sample_dir, tmp_path):
    from tracker.io.specs import POTENCY
    from tracker.io.validate import content_hashes

    pot = sample_dir / "potency.csv"
    lines = pot.read_text(encoding="utf-8").splitlines()
    lines[0] += ",preincubation,max_incubation,target_conc"
    lines[1] += ",15 min,16 h,0.2 nM"
    lines[2:] = [line + ",,," for line in lines[2:]]
    pot.write_text("\n".join(lines) + "\n", encoding="utf-8")
    import_path(migrated_engine, sample_dir, actor="ana")
    stored = queries.potency(migrated_engine)
    first_name = lines[1].split(",")[0]
    row = stored[stored["compound"] == first_name].iloc[0]
    assert row["preincubation_s"] == 900.0 and row["max_incubation_s"] == 16 * 3600.0 and row["target_conc_M"] == pytest.approx(0.2e-9)
    out = tmp_path / "export"
    export_all(migrated_engine, out)
    exported = pd.read_csv(out / "potency.csv", dtype=str, keep_default_na=False)
    first = exported[exported["compound"] == first_name].iloc[0]
    assert (first["preincubation"], first["max_incubation"], first["target_conc"]) == ("15 min", "16 h", "0.2 nM")
    import_path(second_migrated_engine, out, actor="ana")
    assert _content(migrated_engine)["potency"].equals(_content(second_migrated_engine)["potency"])
    # a row without the new columns hashes exactly as before they existed (re-imports of old files add nothing)
    old_cols = [c.name for c in POTENCY.columns if not c.added]
    df = pd.DataFrame([{c: "" for c in POTENCY.names} | {"compound": "X", "value": "1 nM"}])
    legacy = type(POTENCY)(POTENCY.name, POTENCY.db_table, tuple(c for c in POTENCY.columns if c.name in old_cols), hashed=True)
    assert content_hashes(df, POTENCY) == content_hashes(df[old_cols], legacy)
