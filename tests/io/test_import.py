"""Importing the open CSV/XLSX format: all or nothing, every error at file:line: column."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from openpyxl import Workbook

from tracker.cli import main
from tracker.db import queries
from tracker.db.audit import id_ranges, verify_chain
from tracker.db.uow import UnitOfWork
from tracker.errors import ImportErrors, InputError, PermissionDenied
from tracker.services.auditlog import verify
from tracker.services.importing import import_path

POT_HEAD = "compound,assay,readout,value,incubation,format\n"
POT_OK = "AGR-001,new assay,IC50,5 nM,1 h,binding\n"
KIN_HEAD = "compound,method,kon,koff,residence_time,kd\n"
KIN_OK = "AGR-002,spr,2e5 /M/s,1e-4 /s,,\n"
PK_HEAD = "compound,species,route,half_life,free_cmax,tmax\n"
PK_OK = "AGR-001,mouse,oral,2 h,30 nM,30 min\n"
CPD_HEAD = "compound,program,series,stage,smiles\n"
CPD_OK = "NEW-001,Ashgrove,S9,hit,\n"


def _xlsx(path: Path, sheet: str, rows: list[list]) -> Path:
    book = Workbook()
    ws = book.active
    ws.title = sheet
    for r in rows:
        ws.append(r)
    book.save(path)
    return path


def _short(err: InputError) -> str:
    """The error with its file name but without the folder."""
    text = str(err)
    if err.location is not None:
        text = text.replace(err.location.file, Path(err.location.file).name, 1)
    return text


BAD_CSV = {
    "unknown unit": ({"potency.csv": POT_HEAD + POT_OK + "AGR-002,a,IC50,3 nQ,30 min,binding\n"}, "potency.csv:3: value: unknown unit 'nQ'"),
    "dimension mismatch": ({"potency.csv": POT_HEAD + POT_OK + "AGR-002,a,IC50,3 nM,5 nM,binding\n"}, "potency.csv:3: incubation: unit 'nM' is a concentration, expected a time"),
    "missing column": ({"potency.csv": "compound,assay,readout,value,format\n" + "AGR-001,a,IC50,5 nM,binding\n"}, "potency.csv:1: incubation: missing required column"),
    "missing value": ({"potency.csv": POT_HEAD + POT_OK + "AGR-002,,IC50,3 nM,30 min,binding\n"}, "potency.csv:3: assay: missing value"),
    "unknown compound": ({"potency.csv": POT_HEAD + POT_OK + "NOPE-1,a,IC50,3 nM,30 min,binding\n"}, "potency.csv:3: compound: unknown compound 'NOPE-1'"),
    "unknown program": ({"compounds.csv": CPD_HEAD + CPD_OK + "NEW-002,Nowhere,,hit,\n"}, "compounds.csv:3: program: unknown program 'Nowhere'"),
    "negative value": ({"kinetics.csv": KIN_HEAD + KIN_OK + "AGR-001,spr,1e6 /M/s,-1e-3 /s,,\n"}, "kinetics.csv:3: koff: value must be positive"),
    "zero value": ({"pk.csv": PK_HEAD + PK_OK + "AGR-002,rat,iv,0 h,10 nM,\n"}, "pk.csv:3: half_life: value must be positive"),
    "NaN value": ({"potency.csv": POT_HEAD + POT_OK + "AGR-002,a,IC50,NaN nM,30 min,binding\n"}, "potency.csv:3: value: 'NaN nM' is not a finite number"),
    "kon faster than diffusion": ({"kinetics.csv": KIN_HEAD + KIN_OK + "AGR-001,spr,3e10 /M/s,1e-3 /s,,\n"}, "kinetics.csv:3: kon: kon 3e10 /M/s exceeds the diffusion limit"),
    "unknown stage": ({"compounds.csv": CPD_HEAD + CPD_OK + "NEW-002,Ashgrove,,phase-7,\n"}, "compounds.csv:3: stage: unknown stage 'phase-7'"),
    "unreadable SMILES": ({"compounds.csv": CPD_HEAD + CPD_OK + "NEW-002,Ashgrove,,hit,C1CC\n"}, "compounds.csv:3: smiles: RDKit cannot read SMILES 'C1CC'"),
    "SMILES with a bad valence": ({"compounds.csv": CPD_HEAD + CPD_OK + "NEW-002,Ashgrove,,hit,C(C)(C)(C)(C)C\n"}, "compounds.csv:3: smiles: RDKit cannot read SMILES"),
    "unknown method": ({"kinetics.csv": KIN_HEAD + KIN_OK + "AGR-001,guesswork,1e6 /M/s,1e-3 /s,,\n"}, "kinetics.csv:3: method: unknown method 'guesswork'"),
    "koff and residence time both": ({"kinetics.csv": KIN_HEAD + KIN_OK + "AGR-001,spr,1e6 /M/s,1e-3 /s,2 h,\n"}, "kinetics.csv:3: residence_time: give koff or residence_time, not both"),
    "neither koff nor residence time": ({"kinetics.csv": KIN_HEAD + KIN_OK + "AGR-001,spr,1e6 /M/s,,,\n"}, "kinetics.csv:3: koff: give koff or residence_time"),
    "oral PK without tmax": ({"pk.csv": PK_HEAD + PK_OK + "AGR-002,rat,oral,2 h,10 nM,\n"}, "pk.csv:3: tmax: tmax is required for oral PK"),
    "bad date": ({"potency.csv": POT_HEAD.strip() + ",date\n" + POT_OK.strip() + ",2026-01-02\n" + "AGR-002,a,IC50,3 nM,30 min,binding,03/02/2026\n"}, "potency.csv:3: date: not a date"),
    "conflicting duplicate compound": ({"compounds.csv": CPD_HEAD + CPD_OK + "NEW-001,Ashgrove,S1,hit,\n"}, "compounds.csv:3: compound: compound 'NEW-001' is also on"),
    "unknown column": ({"potency.csv": POT_HEAD.strip() + ",hill\n" + POT_OK.strip() + ",1\n"}, "potency.csv:1: hill: unknown column"),
    "empty file": ({"potency.csv": ""}, "potency.csv:1: file is empty"),
    "non-UTF-8 bytes": ({"pk.csv": (PK_HEAD + PK_OK).encode() + "AGR-002,b\xe9agle,iv,2 h,10 nM,\n".encode("latin-1")}, "pk.csv:3: species: byte 0xE9"),
    "semicolons": ({"potency.csv": POT_HEAD.replace(",", ";") + POT_OK.replace(",", ";")}, "potency.csv:1: the file uses ';'"),
}


@pytest.fixture
def loaded(migrated_engine, sample_dir):
    import_path(migrated_engine, sample_dir, actor="ana")
    return migrated_engine


def _write(folder: Path, files: dict) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for name, content in files.items():
        (folder / name).write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    return folder


@pytest.mark.parametrize("case", list(BAD_CSV))
def test_a_bad_csv_import_names_file_line_and_column_and_writes_nothing(loaded, tmp_path, db_snapshot, case):
    files, expected = BAD_CSV[case]
    folder = _write(tmp_path / "bad", files)
    before = db_snapshot(loaded)
    with pytest.raises(ImportErrors) as info:
        import_path(loaded, folder, actor="ana")
    messages = [_short(e) for e in info.value.errors]
    assert any(m.startswith(expected) for m in messages), messages
    assert db_snapshot(loaded) == before


BAD_XLSX = {
    "error cell": ([["compound", "assay", "readout", "value", "incubation", "format"],
                    ["AGR-001", "new assay", "IC50", "5 nM", "1 h", "binding"],
                    ["AGR-002", "a", "IC50", "#DIV/0!", "30 min", "binding"]], "book.xlsx[potency]:3: value: Excel error value #DIV/0!"),
    "TRUE/FALSE cell": ([["compound", "assay", "readout", "value", "incubation", "format"],
                         ["AGR-001", "new assay", "IC50", "5 nM", "1 h", "binding"],
                         ["AGR-002", "a", "IC50", "3 nM", True, "binding"]], "book.xlsx[potency]:3: incubation: TRUE/FALSE cell"),
    "number without unit": ([["compound", "assay", "readout", "value", "incubation", "format"],
                             ["AGR-001", "new assay", "IC50", "5 nM", "1 h", "binding"],
                             ["AGR-002", "a", "IC50", 3.2, "30 min", "binding"]], "book.xlsx[potency]:3: value: missing unit"),
}


@pytest.mark.parametrize("case", list(BAD_XLSX))
def test_a_bad_excel_cell_names_book_sheet_row_and_column_and_writes_nothing(loaded, tmp_path, db_snapshot, case):
    rows, expected = BAD_XLSX[case]
    book = _xlsx(tmp_path / "book.xlsx", "potency", rows)
    before = db_snapshot(loaded)
    with pytest.raises(ImportErrors) as info:
        import_path(loaded, book, actor="ana")
    messages = [_short(e) for e in info.value.errors]
    assert any(m.startswith(expected) for m in messages), messages
    assert db_snapshot(loaded) == before


def test_a_damaged_workbook_is_one_clear_error(migrated_engine, tmp_path):
    book = tmp_path / "broken.xlsx"
    book.write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(ImportErrors) as info:
        import_path(migrated_engine, book)
    assert "not a readable .xlsx workbook" in str(info.value)


def test_every_error_of_an_import_is_reported_not_just_the_first(loaded, tmp_path):
    folder = _write(tmp_path / "bad", {
        "potency.csv": POT_HEAD + "AGR-001,a,IC50,3 nQ,30 min,binding\nAGR-001,a,IC51,-3 nM,30 min,binding\nNOPE,a,IC50,3 nM,1 h,binding\n",
        "compounds.csv": CPD_HEAD + "AGR-001,Ashgrove,S1,clinical,CCO\n",
    })
    with pytest.raises(ImportErrors) as info:
        import_path(loaded, folder)
    got = {_short(e).split(": ", 2)[0] + ": " + _short(e).split(": ", 2)[1] for e in info.value.errors}
    assert got == {
        "compounds.csv:2: stage", "potency.csv:2: value", "potency.csv:3: readout", "potency.csv:3: value", "potency.csv:4: compound",
    }


def test_a_stage_change_of_an_existing_compound_is_refused_on_import(loaded, tmp_path, db_snapshot):
    folder = _write(tmp_path / "again", {"compounds.csv": CPD_HEAD + "AGR-001,Ashgrove,S1,candidate,CCO\n"})
    before = db_snapshot(loaded)
    with pytest.raises(ImportErrors) as info:
        import_path(loaded, folder)
    assert _short(info.value.errors[0]).startswith("compounds.csv:2: stage: stage changes go through gates")
    assert db_snapshot(loaded) == before


def test_the_first_line_the_cli_prints_is_file_line_column_message(loaded, tmp_path, monkeypatch, capsys, login, test_password):
    from tracker.services.users import add_user

    add_user(loaded, "ana", "lead", password=test_password)
    login(loaded, "ana")
    capsys.readouterr()
    monkeypatch.setenv("KRT_DATABASE_URL", loaded.url.render_as_string(hide_password=False))
    folder = _write(tmp_path / "bad", {"potency.csv": POT_HEAD + POT_OK + "AGR-002,a,IC50,3 nQ,30 min,binding\n"})
    assert main(["import", str(folder / "potency.csv"), "--by", "ana"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err[0] == f"krt: error: {folder / 'potency.csv'}:3: value: unknown unit 'nQ' (cell '3 nQ')"
    assert err[-1].startswith("krt: nothing was written")


def test_a_good_import_converts_to_si_and_keeps_the_original_text(loaded):
    pot = queries.potency(loaded).set_index("compound")
    assert pot.loc["AGR-001", "value_M"] == pytest.approx(3.2e-9)
    assert pot.loc["AGR-001", "value_text"] == "3.2 nM"
    assert pot.loc["AGR-002", "value_M"] == pytest.approx(12e-6)
    assert pot.loc["AGR-001", "incubation_s"] == pytest.approx(1800)
    assert pot.loc["AGR-001", "source"] == "potency.csv"  # defaults to the file name
    assert pot.loc["AGR-002", "source"] == "lab-notebook-17"
    kin = queries.kinetics(loaded)
    rt_row = kin[kin["compound"] == "AGR-002"].iloc[0]
    assert rt_row["koff_per_s"] == pytest.approx(1 / (3 * 3600))  # koff = 1/RT
    assert rt_row["koff_given_as"] == "residence_time" and rt_row["koff_text"] == "3 h"
    aur3 = kin[kin["compound"] == "AGR-003"]
    assert aur3["kon_per_M_s"].tolist() == pytest.approx([1e6, 0.05e9 / 60])
    progs = queries.programs(loaded).set_index("name")
    assert progs.loc["Brackenfold", "engagement_threshold"] == pytest.approx(0.5)
    assert progs.loc["Brackenfold", "engagement_threshold_text"] == "50 %"


def test_new_compounds_get_a_stage_history_row_and_the_import_is_audited(loaded):
    hist = queries.stage_history(loaded)
    assert sorted(hist["compound"]) == ["AGR-001", "AGR-002", "AGR-003", "BKF-001"]
    assert hist["from_stage"].isna().all() and set(hist["by_user"]) == {"ana"}
    events = queries.audit_events(loaded, actor="ana")
    assert set(events["entity_type"]) >= {"program", "compounds", "potency", "kinetic_measurements", "pk_profiles"}
    with UnitOfWork(loaded, write=False) as uow:
        assert verify_chain(uow.session)[0]


def _summary_of(engine, table: str) -> dict:
    ev = queries.audit_events(engine, action="import", entity_type=table)
    assert len(ev) == 1, ev
    return json.loads(ev["after_json"].iloc[0])


def _values_digest(engine, table, after):
    """The seal's documented form, recomputed here: SHA-256 over the rows in id order, each block of 1,000 rows

    as the compact JSON list of their value lists (times in UTC, ISO text) and a newline."""
    import datetime as dt
    import hashlib
    import json

    from tracker.db.models import Base

    def iso(v):
        return v.astimezone(dt.timezone.utc).isoformat() if isinstance(v, dt.datetime) else v.isoformat()

    assert after["rows_format"] == 2 and after["row_columns"][0] == "id"
    t = Base.metadata.tables[table]
    with engine.connect() as conn:
        rows = [[getattr(r, c) for c in after["row_columns"]] for r in conn.execute(t.select().order_by(t.c.id))]
    h = hashlib.sha256()
    for i in range(0, len(rows), 1000):
        h.update((json.dumps(rows[i : i + 1000], separators=(",", ":"), ensure_ascii=False, default=iso) + "\n").encode())
    return h.hexdigest()


def test_an_import_is_audited_as_one_summary_per_table_naming_every_row_written_by_id_and_digest(loaded):
    compounds = queries.compounds(loaded).sort_values("id")
    after = _summary_of(loaded, "compounds")
    assert after["inserted"] == 4 and after["stages"] == compounds["stage"].value_counts().to_dict()
    assert id_ranges(compounds["id"]) == after["id_ranges"]
    assert after["rows_sha256"] == _values_digest(loaded, "compounds", after)
    # one summary, not one event per compound: the import is one write
    assert queries.audit_events(loaded, action="create", entity_type="compound").empty
    for table, view in (("potency", queries.potency), ("kinetic_measurements", queries.kinetics), ("pk_profiles", queries.pk)):
        rows = view(loaded).sort_values("id")
        after = _summary_of(loaded, table)
        assert after["inserted"] == len(rows) and id_ranges(rows["id"]) == after["id_ranges"], table
        assert after["rows_sha256"] == _values_digest(loaded, table, after), table
    assert verify(loaded)["ok"]


def test_a_compound_renamed_outside_the_application_no_longer_matches_its_import_event(loaded):
    from sqlalchemy import text

    assert "4 import(s) match their rows" in verify(loaded)["message"]
    with loaded.begin() as conn:
        conn.execute(text("UPDATE compounds SET name = 'AGR-001b' WHERE name = 'AGR-001'"))
    result = verify(loaded)
    event_id = int(queries.audit_events(loaded, action="import", entity_type="compounds")["id"].iloc[0])
    assert not result["ok"] and result["first_broken_id"] == event_id
    assert "compounds rows it imported no longer match" in result["message"]


def test_a_measurement_row_deleted_outside_the_application_is_reported_by_its_import_event(loaded):
    from sqlalchemy import text

    with loaded.begin() as conn:
        victim = conn.execute(text("SELECT max(id) FROM potency")).scalar_one()
        conn.execute(text("DELETE FROM potency WHERE id = :i"), {"i": victim})
    result = verify(loaded)
    event_id = int(queries.audit_events(loaded, action="import", entity_type="potency")["id"].iloc[0])
    assert not result["ok"] and result["first_broken_id"] == event_id and "present" in result["message"]


def test_reimporting_the_same_rows_adds_nothing(loaded, sample_dir, db_snapshot):
    before = db_snapshot(loaded)
    summary = import_path(loaded, sample_dir, actor="ana")
    assert all(t["inserted"] == 0 and t["updated"] == 0 for t in summary["tables"].values())
    assert db_snapshot(loaded) == before


def test_identical_rows_within_one_import_are_kept_as_replicates_and_stay_idempotent(loaded, tmp_path):
    n0 = len(queries.potency(loaded))
    folder = _write(tmp_path / "rep", {"potency.csv": POT_HEAD + POT_OK + POT_OK})
    assert import_path(loaded, folder)["tables"]["potency"]["inserted"] == 2
    assert import_path(loaded, folder)["tables"]["potency"]["inserted"] == 0
    assert len(queries.potency(loaded)) == n0 + 2


def test_rows_may_reference_compounds_created_in_the_same_import(migrated_engine, tmp_path):
    folder = _write(tmp_path / "one", {
        "programs.csv": "program\nNova\n",
        "compounds.csv": CPD_HEAD + "NV-1,Nova,,hit,\n",
        "potency.csv": POT_HEAD + "NV-1,a,IC50,1 nM,1 h,binding\n",
    })
    summary = import_path(migrated_engine, folder)
    assert [summary["tables"][t]["inserted"] for t in ("programs", "compounds", "potency")] == [1, 1, 1]


def test_a_changed_program_threshold_is_updated_with_its_before_and_after_audited(loaded, tmp_path):
    folder = _write(tmp_path / "p", {"programs.csv": "program,engagement_threshold\nAshgrove,0.9\n"})
    assert import_path(loaded, folder, actor="ana")["tables"]["programs"]["updated"] == 1
    assert queries.programs(loaded).set_index("name").loc["Ashgrove", "engagement_threshold"] == pytest.approx(0.9)
    ev = queries.audit_events(loaded, action="update", entity_type="program").iloc[-1]
    assert '"engagement_threshold_text":"0.8"' in ev["before_json"] and '"engagement_threshold_text":"0.9"' in ev["after_json"]


def test_a_kon_above_1e9_is_imported_with_a_warning(loaded, tmp_path):
    folder = _write(tmp_path / "k", {"kinetics.csv": KIN_HEAD + "AGR-001,spr,3e9 /M/s,1e-2 /s,,\n"})
    summary = import_path(loaded, folder)
    assert summary["tables"]["kinetics"]["inserted"] == 1
    assert any("kinetics.csv:2: kon: kon 3e9 /M/s is above ~1e9" in w for w in summary["warnings"])


def test_a_file_named_otherwise_needs_the_table_option(migrated_engine, tmp_path):
    path = tmp_path / "assay-results.csv"
    path.write_text("program\nNova\n", encoding="utf-8")
    with pytest.raises(ImportErrors, match="cannot tell which table"):
        import_path(migrated_engine, path)
    assert import_path(migrated_engine, path, table="programs")["tables"]["programs"]["inserted"] == 1


def test_an_import_inside_a_callers_unit_of_work_is_undone_by_its_rollback(migrated_engine, sample_dir, db_snapshot):
    before = db_snapshot(migrated_engine)
    with UnitOfWork(migrated_engine) as uow:
        import_path(uow, sample_dir)
    assert db_snapshot(migrated_engine) == before


def test_once_users_exist_only_leads_and_scientists_may_import(migrated_engine, sample_dir, db_snapshot):
    import datetime as dt

    from sqlalchemy import insert

    from tracker.db.models import User

    with UnitOfWork(migrated_engine) as uow:
        uow.session.execute(insert(User), [
            {"name": "vic", "role": "viewer", "created_at": dt.datetime.now(dt.timezone.utc), "active": True},
            {"name": "sam", "role": "scientist", "created_at": dt.datetime.now(dt.timezone.utc), "active": True},
        ])
        uow.commit()
    before = db_snapshot(migrated_engine)
    for who in ("vic", "stranger"):
        with pytest.raises(PermissionDenied):
            import_path(migrated_engine, sample_dir, actor=who)
    assert db_snapshot(migrated_engine) == before
    assert import_path(migrated_engine, sample_dir, actor="sam")["tables"]["compounds"]["inserted"] == 4


def test_a_large_import_shows_progress_on_stderr(migrated_engine, tmp_path, capsys):
    n = 6_000
    compounds = CPD_HEAD + "".join(f"BULK-{i:05d},Bulk,,hit,\n" for i in range(n))
    folder = _write(tmp_path / "big", {"programs.csv": "program\nBulk\n", "compounds.csv": compounds})
    summary = import_path(migrated_engine, folder)
    assert summary["tables"]["compounds"]["inserted"] == n
    err = capsys.readouterr().err
    assert "validated 6,001 rows" in err and "compounds 6,000/6,000" in err
    assert queries.counts(migrated_engine)["stage_history"] == n


def test_moving_an_existing_compound_to_another_program_is_refused(loaded, tmp_path, db_snapshot):
    folder = _write(tmp_path / "move", {"compounds.csv": CPD_HEAD + "AGR-001,Brackenfold,S1,hit,CCO\n"})
    before = db_snapshot(loaded)
    with pytest.raises(ImportErrors) as info:
        import_path(loaded, folder)
    assert _short(info.value.errors[0]).startswith("compounds.csv:2: program: AGR-001 belongs to program 'Ashgrove'")
    assert db_snapshot(loaded) == before


def test_a_new_series_for_an_existing_compound_is_updated_and_audited_but_an_empty_cell_clears_nothing(loaded, tmp_path):
    folder = _write(tmp_path / "ser", {"compounds.csv": CPD_HEAD + "AGR-001,Ashgrove,S7,hit,\n"})
    assert import_path(loaded, folder, actor="ana")["tables"]["compounds"]["updated"] == 1
    row = queries.compounds(loaded).set_index("name").loc["AGR-001"]
    assert row["series"] == "S7" and row["smiles"] == "CCO"
    ev = queries.audit_events(loaded, action="update", entity_type="compound").iloc[-1]
    assert ev["before_json"] == '{"series":"S1"}' and ev["after_json"] == '{"series":"S7"}'
    with UnitOfWork(loaded, write=False) as uow:
        assert verify_chain(uow.session)[0]
