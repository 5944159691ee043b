"""Fuzzed bad files against the importer: every one is a clean, located error and writes nothing.

Hypothesis breaks a small valid portfolio (invented) in ways that make it
wrong by construction:

* **bad cells**, 1-3 at once: a quantity with the wrong dimension, an unknown
  or broken unit, no number, a non-finite value; an unknown enumerated value;
  an impossible date; text over its length limit; a required cell left empty;
  a NUL byte anywhere in a cell;
  and, against the database, an unknown compound or program, a stage change
  or a move between programs (stage changes go through gates);
* **bad files**: bytes that are not UTF-8, an empty file, an unknown, doubled
  or missing column, a row with extra fields, semicolons, random text;
* **bad workbook cells** in an ``.xlsx`` sheet.

Every generated case must raise :class:`~tracker.errors.ImportErrors` whose
errors are all :class:`~tracker.errors.InputError` with a location in one of
the imported files (``file:line: column`` where there is a line and a column),
each on one line, and must include the broken cell's own location.  The
full-import runs check after every case that the database is unchanged (row
counts of every table and the audit chain's head).  Most cases take the
validate-only path (reading + validation, no database); a few hundred run the
full import on one SQLite database and a smaller number on PostgreSQL.
Seeds are fixed (``derandomize``).
"""

from __future__ import annotations

import csv
import io
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from openpyxl import Workbook
from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

from tracker.db.audit import chain_head
from tracker.db.uow import UnitOfWork
from tracker.domain import STAGES, canonical
from tracker.errors import ImportErrors, InputError
from tracker.io.reading import gather
from tracker.io.specs import SPECS
from tracker.io.validate import validate_tables
from tracker.services.backup import count_rows
from tracker.services.importing import import_path

pytestmark = pytest.mark.slow  # hypothesis fuzzing: CI and --run-slow

FUZZ = settings(derandomize=True, database=None, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much, HealthCheck.data_too_large])

# ------------------------------------------------------------------ the valid portfolio (invented)
BASE: dict[str, tuple[list[str], list[list[str]]]] = {
    "programs": (["program", "target", "intended_profile", "engagement_threshold", "onset_max", "duration_min", "offset_max", "dosing_interval"],
                 [["Fuzz-A", "Kinase FZ1", "once-daily", "0.8", "2 h", "24 h", "", "24 h"],
                  ["Fuzz-B", "Receptor FZ2", "short-acting", "50 %", "15 min", "", "4 h", ""]]),
    "compounds": (["compound", "program", "series", "stage", "smiles"],
                  [["FZ-001", "Fuzz-A", "S1", "hit", "CCO"], ["FZ-002", "Fuzz-A", "S1", "lead-optimization", ""],
                   ["FZ-003", "Fuzz-A", "S2", "candidate", "c1ccccc1"], ["FZ-004", "Fuzz-B", "", "hit-to-lead", ""],
                   ["FZ-005", "Fuzz-B", "S9", "hit", ""]]),
    "potency": (["compound", "assay", "readout", "value", "incubation", "format", "tracer_conc", "tracer_kd", "tracer_residence_time",
                 "max_response_fraction", "date", "source"],
                [["FZ-001", "TR-FRET binding", "IC50", "3.2 nM", "30 min", "competition-binding", "5 nM", "2 nM", "10 min", "", "2026-01-05", ""],
                 ["FZ-002", "enzyme activity", "Ki", "12 µM", "1 h", "enzyme", "", "", "", "", "", "notebook-17"],
                 ["FZ-003", "cell reporter", "EC50", "0.45 nM", "4 h", "functional", "", "", "", "0.7", "2026-02-11", ""],
                 ["FZ-004", "radioligand", "Kb", "8e-9 M", "90 min", "binding", "", "", "", "", "", ""],
                 ["FZ-005", "TR-FRET binding", "IC50", "40 nM", "30 min", "competition-binding", "5 nM", "2 nM", "10 min", "", "", ""]]),
    "kinetics": (["compound", "method", "kon", "koff", "residence_time", "kd", "kon_low", "kon_high", "koff_low", "koff_high", "date", "source"],
                 [["FZ-001", "spr", "1e6 /M/s", "1e-3 /s", "", "1 nM", "5e5 /M/s", "2e6 /M/s", "5e-4 /s", "2e-3 /s", "2026-01-10", ""],
                  ["FZ-002", "jump-dilution", "", "", "3 h", "", "", "", "", "", "", ""],
                  ["FZ-003", "competition-kinetics", "0.06 /nM/min", "", "45 min", "", "", "", "", "", "2026-02-01", ""],
                  ["FZ-005", "spr", "2e5 /M/s", "4e-3 /s", "", "", "", "", "", "", "", "run 12"]]),
    "pk": (["compound", "species", "route", "half_life", "free_cmax", "tmax", "dosing_interval", "source"],
           [["FZ-003", "rat", "oral", "4 h", "50 nM", "1 h", "24 h", ""], ["FZ-003", "rat", "iv", "3 h", "200 nM", "", "", ""],
            ["FZ-004", "dog", "oral", "90 min", "12 nM", "30 min", "", "study-9"]]),
}
TABLES = tuple(BASE)


def _render(header: list[str], rows: list[list[str]]) -> tuple[str, list[int]]:
    """CSV text and the physical line on which each data row starts (header on line 1)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    lines = []
    for row in rows:
        lines.append(buf.getvalue().count("\n") + 1)
        w.writerow(row)
    return buf.getvalue(), lines


@dataclass
class Case:
    """A broken portfolio: file contents and the locations that must be reported."""

    files: dict[str, bytes]
    expect: list[tuple[str, int | None, str | None]] = field(default_factory=list)  # (file name, line, column)
    why: str = ""
    xlsx: bool = False
    touched: set[str] = field(default_factory=set)  # files that differ from the valid portfolio


def _files(tables: dict[str, tuple[list[str], list[list[str]]]]) -> tuple[dict[str, bytes], dict[str, list[int]]]:
    files, lines = {}, {}
    for name, (header, rows) in tables.items():
        text, row_lines = _render(header, rows)
        files[f"{name}.csv"] = text.encode("utf-8")
        lines[name] = row_lines
    return files, lines


def _copy() -> dict[str, tuple[list[str], list[list[str]]]]:
    """The valid portfolio with every column of the format (optional columns added later stay empty), so a
    broken cell can land in any column, including ones the format gained after this file was written."""
    out = {}
    for t, (h, rows) in BASE.items():
        extra = [c.name for c in SPECS[t].columns if c.name not in h]
        out[t] = (list(h) + extra, [list(r) + [""] * len(extra) for r in rows])
    return out


# ------------------------------------------------------------------ bad values
_no_cr = st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\x00")
WRONG_UNIT = {"concentration": ["30 min", "2 h", "1e-3 /s", "1e6 /M/s", "5 M*s"], "time": ["5 nM", "1e-3 /s", "3 M", "2 s^2"],
              "rate1": ["30 min", "5 nM", "1e6 /M/s"], "rate2": ["1e-3 /s", "5 nM", "2 h", "3 M/s"],
              "fraction": ["5 nM", "2 h", "1e-3 /s", "2", "160 %"]}
ALWAYS_BAD_QUANTITY = ["abc", "nM 5", "--3 nM", "nan nM", "inf s", "1e999 M", "3 nQ", "2 fortnights", "3 (nM", "4 nM)", "5 /", "6 M^x", "7 µ"]


def bad_quantity(kind: str):
    return st.one_of(st.sampled_from(WRONG_UNIT[kind] + ALWAYS_BAD_QUANTITY),
                     st.text(alphabet="xyzqwjkXYZQWJK", min_size=1, max_size=5).map(lambda u: f"2.5 {u}"))


def bad_enum(choices):
    return st.text(_no_cr, min_size=1, max_size=20).filter(lambda v: v.strip() and canonical(v.strip(), choices) is None)


bad_date = st.one_of(st.sampled_from(["2026-13-01", "2026-02-30", "01/02/2026", "yesterday", "2026-1-5", "20260105", "2026-00-10"]),
                     st.text(_no_cr, min_size=1, max_size=12).filter(lambda v: v.strip() and not v.strip()[:4].isdigit()))


def bad_value_for(col):
    """A strategy of values bad for ``col`` on their own (no database needed), or ``None`` when there is none."""
    if col.is_quantity:
        return bad_quantity(col.kind)
    if col.kind == "enum":
        return bad_enum(col.choices)
    if col.kind == "date":
        return bad_date
    if col.kind in ("text", "ref") and col.max_len <= 300:
        return st.integers(1, 40).map(lambda k, n=col.max_len: "x" * (n + k))
    return None


@st.composite
def cell_cases(draw, with_database: bool = False):
    """1-3 broken cells in a copy of the portfolio, each with the location that must be reported."""
    tables = _copy()
    _, lines = _files(tables)
    chosen: dict[tuple[str, int, str], str] = {}
    for _ in range(draw(st.integers(1, 3))):
        table = draw(st.sampled_from(TABLES))
        spec = SPECS[table]
        header, rows = tables[table]
        r = draw(st.integers(0, len(rows) - 1))
        kinds = ["value", "nul"]
        if any(c.required for c in spec.columns):
            kinds.append("blank")
        if with_database and table != "programs":  # a new program name is valid, not bad
            kinds.append("database")
        how = draw(st.sampled_from(kinds))
        if how == "blank":
            col = draw(st.sampled_from([c for c in spec.columns if c.required]))
            value, column = "", col.name
        elif how == "nul":  # a NUL byte anywhere in any cell, e.g. from a binary paste
            col = draw(st.sampled_from(list(spec.columns)))
            current = rows[r][header.index(col.name)] or "x"
            k = draw(st.integers(0, len(current)))
            value, column = current[:k] + "\x00" + current[k:], col.name
        elif how == "database":
            if table == "compounds":
                col = draw(st.sampled_from(["program", "stage", "program-moved"]))
                current = rows[r][header.index("stage")]
                if col == "stage":
                    value, column = draw(st.sampled_from([s for s in STAGES if s != current])), "stage"
                elif col == "program-moved":
                    here = rows[r][header.index("program")]
                    value, column = ("Fuzz-B" if here == "Fuzz-A" else "Fuzz-A"), "program"
                else:
                    value, column = draw(st.sampled_from(["No Such Program", "Fuzz-C", "fuzz-a "])), "program"
            else:
                value, column = draw(st.sampled_from(["FZ-999", "NOPE-1", "fz-001x"])), "compound"
        else:
            candidates = [c for c in spec.columns if bad_value_for(c) is not None]
            col = draw(st.sampled_from(candidates))
            value, column = draw(bad_value_for(col)), col.name
        if table == "kinetics" and column == "residence_time" and not value:
            column = "koff"
        chosen[(table, r, column)] = (value, how)
    for (table, r, column), (value, _how) in chosen.items():
        header, rows = tables[table]
        rows[r][header.index(column)] = value
    assert chosen
    files, lines = _files(tables)
    expect = []
    for (table, r, column), (value, how) in chosen.items():
        col = SPECS[table].col(column)
        if how == "database" and table == "compounds" and value in STAGES + ("Fuzz-A", "Fuzz-B") and ("compounds", r, "compound") in chosen:
            continue  # a stage change or a move is only one for the stored compound: its name was broken too
        if table == "kinetics" and column in ("koff", "residence_time") and not value:
            column = "koff"  # an emptied koff/residence time is reported as "give koff or residence_time"
        if not value and not col.required and column != "koff":
            continue
        expect.append((f"{table}.csv", lines[table][r], column))
    return Case(files, expect, why=f"cells {chosen!r}", touched={f"{t}.csv" for t, _r, _c in chosen})  # expect may be empty: still must fail


INVALID_BYTES = [b"\xff", b"\xfe\xfe", b"\xc3(", b"\xe9", b"\x80", b"\xed\xa0\x80", b"\xf8\x88\x80\x80\x80"]


@st.composite
def file_cases(draw):
    """One file of the portfolio broken as a file (bytes, header, shape)."""
    tables = _copy()
    files, lines = _files(tables)
    table = draw(st.sampled_from(TABLES))
    name = f"{table}.csv"
    header, rows = tables[table]
    how = draw(st.sampled_from(["bytes", "empty", "unknown-column", "double-column", "missing-column", "extra-fields", "semicolons", "noise"]))
    if how == "bytes":
        r = draw(st.integers(0, len(rows) - 1))
        data = files[name]
        starts = [0] + [i + 1 for i, b in enumerate(data) if b == 0x0A]
        line_start, line_end = starts[lines[table][r] - 1], starts[lines[table][r]] - 1
        pos = draw(st.integers(line_start, line_end - 1))
        files[name] = data[:pos] + draw(st.sampled_from(INVALID_BYTES)) + data[pos:]
        return Case(files, [(name, lines[table][r], "*")], why=f"invalid UTF-8 at byte {pos}", touched={name})
    if how == "empty":
        files[name] = draw(st.sampled_from([b"", b"\n", b"  \n\n", b",,,\n", b"\xef\xbb\xbf"]))
        return Case(files, [(name, 1, None)], why="empty", touched={name})
    if how == "unknown-column":
        extra = draw(st.text(alphabet="abcdefghijklmnopqrstuvwxyz_0123456789", min_size=1, max_size=12).filter(lambda n: n not in SPECS[table].names))
        text, _ = _render(header + [extra], [r + ["1"] for r in rows])
        files[name] = text.encode()
        return Case(files, [(name, 1, extra)], why=f"unknown column {extra}", touched={name})
    if how == "double-column":
        dup = draw(st.sampled_from(header))
        text, _ = _render(header + [dup.upper()], [r + [r[header.index(dup)]] for r in rows])
        files[name] = text.encode()
        return Case(files, [(name, 1, dup)], why=f"column {dup} twice", touched={name})
    if how == "missing-column":
        gone = draw(st.sampled_from(list(SPECS[table].required)))
        i = header.index(gone)
        text, _ = _render(header[:i] + header[i + 1:], [r[:i] + r[i + 1:] for r in rows])
        files[name] = text.encode()
        return Case(files, [(name, 1, gone)], why=f"missing column {gone}", touched={name})
    if how == "extra-fields":
        r = draw(st.integers(0, len(rows) - 1))
        extra = draw(st.lists(st.text(alphabet="abc123", min_size=1, max_size=4), min_size=1, max_size=3))
        text, row_lines = _render(header, [row + extra if k == r else row for k, row in enumerate(rows)])
        files[name] = text.encode()
        return Case(files, [(name, row_lines[r], None)], why="extra fields", touched={name})
    if how == "semicolons":
        files[name] = files[name].replace(b",", b";")
        return Case(files, [(name, 1, None)], why="semicolons", touched={name})
    noise = draw(st.text(_no_cr, max_size=200))
    files[name] = ("%%" + noise).encode("utf-8")  # a header no table has
    return Case(files, [(name, None, None)], why="noise", touched={name})


@st.composite
def xlsx_cases(draw):
    """A workbook with one sheet per table and one bad cell (or an Excel error value / a time-of-day cell)."""
    tables = _copy()
    table = draw(st.sampled_from(TABLES))
    spec = SPECS[table]
    header, rows = tables[table]
    r = draw(st.integers(0, len(rows) - 1))
    how = draw(st.sampled_from(["value", "excel-error", "boolean"]))
    if how == "value":
        col = draw(st.sampled_from([c for c in spec.columns if bad_value_for(c) is not None]))
        value = draw(bad_value_for(col).filter(lambda v: not ILLEGAL_CHARACTERS_RE.search(v)))  # a sheet cannot hold them
        column = col.name
    else:
        col = draw(st.sampled_from([c for c in spec.columns if c.is_quantity] or [c for c in spec.columns if c.kind == "enum"]))
        value, column = ("#DIV/0!" if how == "excel-error" else True), col.name
    book = Workbook()
    book.remove(book.active)
    for t, (h, rs) in tables.items():
        ws = book.create_sheet(t)
        ws.append(h)
        for k, row in enumerate(rs):
            cells = [v if v != "" else None for v in row]
            if t == table and k == r:
                cells[h.index(column)] = value
            ws.append(cells)
    buf = io.BytesIO()
    book.save(buf)
    return Case({"portfolio.xlsx": buf.getvalue()}, [(f"portfolio.xlsx[{table}]", r + 2, column)], why=f"{table} row {r} {column}={value!r}",
                xlsx=True, touched={"portfolio.xlsx"})


# ------------------------------------------------------------------ checks
def _write(folder: Path, case: Case, only_touched: bool = False) -> None:
    """The case's files; with ``only_touched`` just the broken ones (the others are known to be valid, or stored)."""
    for name, data in case.files.items():
        if not only_touched or name in case.touched:
            (folder / name).write_bytes(data)


def _check_errors(errors: list, folder: Path, case: Case) -> None:
    assert errors, f"no error for a broken portfolio ({case.why})"
    labels = {str(folder / n) for n in case.files} | {str(folder / "portfolio.xlsx") + f"[{t}]" for t in TABLES}
    for err in errors:
        assert isinstance(err, InputError), (type(err), err)
        loc = err.location
        assert loc is not None and loc.file in labels, (str(err), case.why)
        text = str(err)
        assert "\n" not in text and "\r" not in text, text
        prefix = loc.file + (f":{loc.line}" if loc.line is not None else "") + (f": {loc.column}" if loc.column else "") + ": "
        assert text.startswith(prefix), (text, prefix)
    found = {(Path(e.location.file).name, e.location.line, e.location.column) for e in errors}
    for name, line, column in case.expect:
        if column == "*":  # the column of an undecodable byte: any named one
            assert any(n == name and ln == line and c for n, ln, c in found), (name, line, sorted(found, key=str), case.why)
        elif line is None:
            assert any(n == name for n, _l, _c in found), (name, sorted(found, key=str), case.why)
        else:
            assert (name, line, column) in found, ((name, line, column), sorted(found, key=str), case.why)


def _validate_only(folder: Path) -> list:
    raws, source_errors = gather(folder)
    validated = validate_tables(raws)
    return source_errors + [e for e in validated.errors if e not in source_errors]


def _state(engine):
    with UnitOfWork(engine, write=False) as uow:
        head = chain_head(uow.session)
    return count_rows(engine), head


# ------------------------------------------------------------------ tests
def test_the_unbroken_portfolio_imports_cleanly(migrated_engine, tmp_path):
    files, _ = _files(_copy())
    _write(tmp_path, Case(files))
    assert _validate_only(tmp_path) == []
    summary = import_path(migrated_engine, tmp_path, actor="fuzz")
    assert summary["tables"]["compounds"]["inserted"] == 5
    assert import_path(migrated_engine, tmp_path, actor="fuzz")["tables"]["potency"]["inserted"] == 0  # idempotent


@settings(FUZZ, max_examples=400)
@given(case=st.one_of(cell_cases(), file_cases()))
def test_every_broken_file_or_cell_is_reported_at_its_location_by_validation(case):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        _write(folder, case, only_touched=True)
        _check_errors(_validate_only(folder), folder, case)


@settings(FUZZ, max_examples=60)
@given(case=xlsx_cases())
def test_every_broken_workbook_cell_is_reported_at_its_sheet_row_and_column(case):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        _write(folder, case)
        _check_errors(_validate_only(folder), folder, case)


FULL_EXAMPLES = {"sqlite": 250, "postgresql": 80}


def test_a_failed_import_of_any_broken_portfolio_leaves_the_database_unchanged(migrated_engine, backend, tmp_path):
    files, _ = _files(_copy())
    base = tmp_path / "base"
    base.mkdir()
    _write(base, Case(files))
    import_path(migrated_engine, base, actor="fuzz")  # the database already holds the portfolio
    before = _state(migrated_engine)
    seen = {"cases": 0}

    @settings(FUZZ, max_examples=FULL_EXAMPLES[backend])
    @given(case=st.one_of(cell_cases(with_database=True), cell_cases(), file_cases(), xlsx_cases()))
    def attempt(case):
        with tempfile.TemporaryDirectory(dir=tmp_path) as tmp:
            folder = Path(tmp)
            _write(folder, case, only_touched=case.touched and len(case.touched) % 2 == 1)  # often just the broken files
            with pytest.raises(ImportErrors) as info:
                import_path(migrated_engine, folder, actor="fuzz")
            _check_errors(info.value.errors, folder, case)
        assert _state(migrated_engine) == before, case.why
        seen["cases"] += 1

    attempt()
    assert seen["cases"] >= FULL_EXAMPLES[backend] // 2


def test_a_nul_character_in_a_text_cell_is_refused_at_its_location(migrated_engine, tmp_path):
    tables = _copy()
    header, rows = tables["compounds"]
    rows.append(["FZ-\x00-006", "Fuzz-A", "S1", "hit", ""])
    files, lines = _files({"programs": tables["programs"], "compounds": (header, rows)})
    _write(tmp_path, Case(files))
    before = _state(migrated_engine)
    with pytest.raises(ImportErrors) as info:
        import_path(migrated_engine, tmp_path, actor="fuzz")
    _check_errors(info.value.errors, tmp_path, Case(files, [("compounds.csv", lines["compounds"][-1], "compound")]))
    assert _state(migrated_engine) == before
