"""Reading CSV files and ``.xlsx`` sheets into tables of text cells, with their line numbers.

Every cell arrives as stripped text (``None`` when empty) so validation sees
the same thing from either format.  Lines are 1-based physical lines of the
CSV file with the header on line 1 (a quoted cell spanning lines counts from
its first line); for a sheet they are the sheet's row numbers.  Problems are
collected as :class:`~tracker.errors.InputError` and never raised one at a time.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..errors import InputError
from .specs import SPECS, table_for_name


@dataclass
class RawTable:
    """One file or sheet: text cells (``None`` = empty), line numbers and where it came from."""

    table: str
    label: str  # "path/potency.csv" or "book.xlsx[potency]" - used in messages
    source_name: str  # the file name (or book name) stored as a measurement's default source
    cells: pd.DataFrame  # columns as in the header (lower-case), object dtype of str/None
    lines: list[int]
    header_line: int = 1
    errors: list[InputError] = field(default_factory=list)
    header_text: dict[str, str] = field(default_factory=dict)  # lower-case name -> the header cell as written

    def original(self, name: str) -> str:
        """The header cell of column ``name`` as written (units keep their case: ``nM`` is not ``nm``)."""
        return self.header_text.get(name, name)

    def error(self, line: int | None, column: str | None, message: str) -> InputError:
        return InputError(message, file=self.label, line=line, column=column)


def _num_text(v: float | int) -> str:
    if isinstance(v, bool):
        return str(v)
    if isinstance(v, int):
        return str(v)
    if math.isfinite(v) and float(v).is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(float(v))


# ------------------------------------------------------------------ CSV
def _decode(data: bytes, label: str) -> tuple[str | None, InputError | None]:
    try:
        return data.decode("utf-8-sig"), None
    except UnicodeDecodeError as exc:
        start = exc.start
        line_start = data.rfind(b"\n", 0, start) + 1
        line = data.count(b"\n", 0, start) + 1
        byte_col = start - line_start + 1
        header = data.split(b"\n", 1)[0].decode("utf-8-sig", errors="replace").strip("\r")
        names = next(csv.reader([header]), [])
        prefix = data[line_start:start].decode("utf-8", errors="replace")
        field_no = len(next(csv.reader([prefix]), [""])) - 1 if prefix else 0
        column = names[field_no].strip().lower() if 0 <= field_no < len(names) else f"field {field_no + 1}"
        bad = data[start : start + 1].hex().upper()
        return None, InputError(
            f"byte 0x{bad} at byte {byte_col} of the line is not UTF-8; save the file as UTF-8 (CSV UTF-8)",
            file=label,
            line=line,
            column=column,
        )


def _expected_header(table: str) -> str:
    return ",".join(SPECS[table].names) if table in SPECS else "the column names"


def read_csv(path: Path, table: str, label: str | None = None) -> RawTable:
    """Read one CSV file of ``table``; problems go to ``RawTable.errors``."""
    label = label or str(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raw = RawTable(table, label, path.name, pd.DataFrame(), [])
        raw.errors.append(InputError(f"cannot read file: {exc.strerror or exc}", file=label))
        return raw
    return read_csv_bytes(data, table, label, path.name)


def read_csv_bytes(data: bytes, table: str, label: str, source_name: str | None = None) -> RawTable:
    """Read the bytes of one CSV file (an upload, say) of ``table``; same rules and messages as :func:`read_csv`."""
    raw = RawTable(table, label, source_name or label, pd.DataFrame(), [])
    text, err = _decode(data, label)
    if err:
        raw.errors.append(err)
        return raw
    if not text.strip():
        raw.errors.append(raw.error(1, None, f"file is empty; expected a header line: {_expected_header(table)}"))
        return raw
    reader = csv.reader(io.StringIO(text, newline=""))
    records: list[list[str]] = []
    ends: list[int] = []
    malformed: InputError | None = None
    try:
        for record in reader:
            records.append(record)
            ends.append(reader.line_num)
    except csv.Error as exc:
        malformed = raw.error(reader.line_num, None, f"malformed CSV: {exc}")
    # a record starts on the line after the previous one ended (a quoted cell may span lines)
    starts = [1] + [e + 1 for e in ends[:-1]]
    header: list[str] | None = None
    first = 0
    for first, record in enumerate(records):
        if record and any(c.strip() for c in record):
            header = [c.strip().lower() for c in record]
            raw.header_text = {c.strip().lower(): c.strip() for c in record}
            raw.header_line = starts[first]
            break
    if header is None:
        if malformed is not None:
            raw.errors.append(malformed)
        else:
            _finish(raw, None, [], [])
        return raw
    body, body_starts = records[first + 1 :], starts[first + 1 :]
    width = len(header)
    if malformed is None and all(len(r) == width for r in body):
        # the usual file: every line as wide as the header; strip and blank cells column by column
        columns = [[c.strip() or None for c in col] for col in zip(*body)] if body else [[] for _ in range(width)]
        blank = [all(c is None for c in cells) for cells in zip(*columns)] if body else []
        if any(blank):
            keep = [i for i, b in enumerate(blank) if not b]
            columns = [[col[i] for i in keep] for col in columns]
            body_starts = [body_starts[i] for i in keep]
        _finish(raw, header, None, body_starts, columns=columns)
        return raw
    rows: list[list[str | None]] = []
    lines: list[int] = []
    for record, start in zip(body, body_starts):
        if not record or all(not c.strip() for c in record):
            continue
        if len(record) > width:
            extra = [c for c in record[width:] if c.strip()]
            if extra:
                raw.errors.append(raw.error(start, None, f"line has {len(record)} fields but the header has {width}"))
                continue
            record = record[:width]
        rows.append([c.strip() or None for c in record] + [None] * (width - len(record)))
        lines.append(start)
    if malformed is not None:  # the lines before it are checked (one run lists every problem), nothing is kept
        raw.errors.append(malformed)
        return raw
    _finish(raw, header, rows, lines)
    return raw


def _finish(raw: RawTable, header: list[str] | None, rows: list | None, lines: list[int], *, columns: list[list] | None = None) -> None:
    """Check the header and build ``raw.cells`` from ``rows`` (lists of cells) or ``columns`` (lists of values)."""
    if header is None:
        raw.errors.append(raw.error(1, None, "no header line"))
        return
    if len(header) == 1 and ";" in header[0]:
        raw.errors.append(raw.error(raw.header_line, None, "the file uses ';' between fields; save it comma-separated"))
        return
    if len(header) == 1 and "\t" in header[0]:
        raw.errors.append(raw.error(raw.header_line, None, "the file uses tabs between fields; save it comma-separated"))
        return
    if columns is None:
        columns = [list(col) for col in zip(*rows)] if rows else [[] for _ in header]
    seen: set[str] = set()
    for i, name in enumerate(header):
        if not name:
            if any(v is not None for v in columns[i]):
                raw.errors.append(raw.error(raw.header_line, f"field {i + 1}", "column without a name has values"))
            continue
        if name in seen:
            raw.errors.append(raw.error(raw.header_line, name, "column appears twice in the header"))
        seen.add(name)
    keep = [i for i, name in enumerate(header) if name]
    names = [header[i] for i in keep]
    if len(set(names)) != len(names):
        return
    raw.cells = pd.DataFrame({name: pd.Series(columns[i], dtype=object) for name, i in zip(names, keep)}, columns=names)
    raw.lines = lines


def iter_csv_chunks(path: Path, table: str, rows: int = 50_000, label: str | None = None) -> Iterator[RawTable]:
    """Read a large CSV file ``rows`` records at a time, in bounded memory.

    Each chunk is a :class:`RawTable` with the header's columns and its own
    line numbers, exactly as :func:`read_csv` would number them; problems go to
    the chunk's ``errors``.  A file that is not UTF-8 is handed to
    :func:`read_csv`, which locates the first bad byte.  After a malformed
    record nothing more is read.
    """
    label = label or str(path)
    try:
        fh = path.open("r", encoding="utf-8-sig", newline="")
    except OSError as exc:
        raw = RawTable(table, label, path.name, pd.DataFrame(), [])
        raw.errors.append(InputError(f"cannot read file: {exc.strerror or exc}", file=label))
        yield raw
        return
    try:
        yield from _csv_chunks(fh, path, table, rows, label)
    except UnicodeDecodeError:
        yield read_csv(path, table, label)  # reports the first byte that is not UTF-8 with its line and column
    finally:
        fh.close()


def _csv_chunks(fh, path: Path, table: str, size: int, label: str) -> Iterator[RawTable]:
    reader = csv.reader(fh)
    header: list[str] | None = None
    header_line = 1
    end = 0  # last physical line consumed
    rows: list[list[str | None]] = []
    lines: list[int] = []
    pending: list[InputError] = []

    def chunk() -> RawTable:
        raw = RawTable(table, label, path.name, pd.DataFrame(), [])
        raw.header_line = header_line
        raw.errors.extend(pending)
        _finish(raw, list(header or []), rows, lines)
        return raw

    while True:
        start = end + 1
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            raw = RawTable(table, label, path.name, pd.DataFrame(), [])
            raw.errors.append(raw.error(reader.line_num, None, f"malformed CSV: {exc}"))
            yield raw
            return
        end = reader.line_num
        if header is None:
            if record and any(c.strip() for c in record):
                header = [c.strip().lower() for c in record]
                header_line = start
                probe = RawTable(table, label, path.name, pd.DataFrame(), [])
                probe.header_line = header_line
                _finish(probe, header, [], [])
                if probe.errors:
                    yield probe
                    return
            continue
        if not record or all(not c.strip() for c in record):
            continue
        width = len(header)
        if len(record) > width:
            if any(c.strip() for c in record[width:]):
                pending.append(InputError(f"line has {len(record)} fields but the header has {width}", file=label, line=start))
                continue
            record = record[:width]
        rows.append([c.strip() or None for c in record] + [None] * (width - len(record)))
        lines.append(start)
        if len(rows) >= size:
            yield chunk()
            rows, lines, pending = [], [], []
    if header is None:
        raw = RawTable(table, label, path.name, pd.DataFrame(), [])
        raw.errors.append(raw.error(1, None, f"file is empty; expected a header line: {','.join(SPECS[table].names)}"))
        yield raw
        return
    if rows or pending or not lines:
        yield chunk()


# ------------------------------------------------------------------ XLSX
def read_xlsx(path: Path, only_table: str | None = None, label: str | None = None) -> list[RawTable]:
    """Read the sheets of a workbook that name tables (or, with ``only_table``, that one sheet)."""
    from openpyxl import load_workbook

    label = label or str(path)
    try:
        book = load_workbook(path, read_only=True, data_only=False)  # formula cells arrive as formulas and are refused
    except Exception as exc:  # openpyxl raises many types for a damaged or foreign file
        return [_broken(path, label, only_table, f"not a readable .xlsx workbook ({type(exc).__name__}: {exc})")]
    try:
        sheets = list(book.sheetnames)
        chosen: list[tuple[str, str]] = []
        if only_table:
            match = [s for s in sheets if table_for_name(s) == only_table]
            if match:
                chosen = [(match[0], only_table)]
            elif len(sheets) == 1:
                chosen = [(sheets[0], only_table)]
            else:
                return [_broken(path, label, only_table, f"no sheet named {only_table!r} (sheets: {', '.join(sheets)})")]
        else:
            for s in sheets:
                t = table_for_name(s)
                if t is None:
                    return [_broken(path, f"{label}[{s}]", "programs", f"sheet name does not name a table ({', '.join(SPECS)})")]
                chosen.append((s, t))
        return [_read_sheet(book[s], t, f"{label}[{s}]", path.name) for s, t in chosen]
    finally:
        book.close()


def _broken(path: Path, label: str, table: str | None, message: str) -> RawTable:
    raw = RawTable(table or "programs", label, path.name, pd.DataFrame(), [])
    raw.errors.append(InputError(message, file=label))
    return raw


def _read_sheet(ws, table: str, label: str, source_name: str) -> RawTable:
    raw = RawTable(table, label, source_name, pd.DataFrame(), [])
    header: list[str] | None = None
    rows: list[list[str | None]] = []
    lines: list[int] = []
    for row in ws.iter_rows():
        cells = [c for c in row if c.value is not None]
        if not cells:
            continue
        if header is None:
            header = [("" if c.value is None else str(c.value)).strip().lower() for c in row]
            raw.header_text = {("" if c.value is None else str(c.value)).strip().lower(): ("" if c.value is None else str(c.value)).strip() for c in row}
            raw.header_line = cells[0].row
            continue
        line = cells[0].row
        values: list[str | None] = []
        for j, c in enumerate(row):
            col = header[j] if j < len(header) else f"column {j + 1}"
            values.append(_cell_text(raw, c, line, col))
        if len(values) > len(header):
            if any(v is not None for v in values[len(header) :]):
                raw.errors.append(raw.error(line, None, "row has values right of the last header column"))
                continue
            values = values[: len(header)]
        values += [None] * (len(header) - len(values))
        rows.append(values)
        lines.append(line)
    if header is None:
        raw.errors.append(raw.error(1, None, f"sheet is empty; expected a header row: {_expected_header(table)}"))
        return raw
    _finish(raw, header, rows, lines)
    return raw


def _cell_text(raw: RawTable, cell, line: int, column: str) -> str | None:
    v = cell.value
    if v is None:
        return None
    kind = getattr(cell, "data_type", None)
    if kind == "f" or (isinstance(v, str) and kind != "s" and v.startswith("=")):
        raw.errors.append(raw.error(line, column, "a formula cell; paste the values as text (formulas are not imported)"))
        return None
    if kind == "e":
        raw.errors.append(raw.error(line, column, f"Excel error value {v!s} in the cell"))
        return None
    if isinstance(v, bool):
        raw.errors.append(raw.error(line, column, f"TRUE/FALSE cell ({v}) is not a valid value"))
        return None
    if isinstance(v, (dt.datetime, dt.date)):
        if column == "date":
            return (v.date() if isinstance(v, dt.datetime) else v).isoformat()
        raw.errors.append(raw.error(line, column, f"a date cell ({v}) where text is expected; format the cell as text"))
        return None
    if isinstance(v, dt.time):
        raw.errors.append(raw.error(line, column, f"a time-of-day cell ({v}); write durations with a unit, e.g. '30 min'"))
        return None
    if isinstance(v, (int, float)):
        if isinstance(v, float) and not math.isfinite(v):
            raw.errors.append(raw.error(line, column, f"not a finite number: {v}"))
            return None
        return _num_text(v)
    text = str(v).strip()
    return text or None


# ------------------------------------------------------------------ sources
def gather(path: Path, table: str | None = None) -> tuple[list[RawTable], list[InputError]]:
    """Read a file (CSV or XLSX) or a folder of them; returns tables and errors about the sources."""
    tables, errors, _ = gather_deferred(path, table, None)
    return tables, errors


def gather_deferred(path: Path, table: str | None = None, defer_over: int | None = None,
                    defer_tables: tuple[str, ...] = ()) -> tuple[list[RawTable], list[InputError], list[tuple[Path, str]]]:
    """Like :func:`gather`, but CSV files of ``defer_tables`` are not read when one of a table's files exceeds
    ``defer_over`` bytes: those come back as ``(path, table)`` to be read in chunks (:func:`iter_csv_chunks`)."""
    errors: list[InputError] = []
    if table is not None and table not in SPECS:
        errors.append(InputError(f"unknown table {table!r}; tables are {', '.join(SPECS)}", file=str(path)))
        return [], errors, []
    if not path.exists():
        errors.append(InputError("no such file or folder", file=str(path)))
        return [], errors, []
    if path.is_dir():
        if table is not None:
            errors.append(InputError("--table applies to one file, not a folder", file=str(path)))
            return [], errors, []
        files = sorted(p for p in path.iterdir() if p.is_file() and p.suffix.lower() in (".csv", ".xlsx") and not p.name.startswith((".", "~$")))
        if not files:
            errors.append(InputError(f"no .csv or .xlsx files in the folder (expected {', '.join(s + '.csv' for s in SPECS)})", file=str(path)))
            return [], errors, []
    else:
        files = [path]
    tables: list[RawTable] = []
    deferred: list[tuple[Path, str]] = []
    big: set[str] = set()
    if defer_over is not None:
        for f in files:
            t = table or table_for_name(f.stem)
            if f.suffix.lower() in (".csv", ".txt") and t in defer_tables and f.stat().st_size > defer_over:
                big.add(t)
    for f in files:
        suffix = f.suffix.lower()
        if suffix == ".xlsx":
            tables.extend(read_xlsx(f, only_table=table))
            continue
        if suffix not in (".csv", ".txt"):
            errors.append(InputError("unsupported file type; give a .csv or .xlsx file", file=str(f)))
            continue
        t = table or table_for_name(f.stem)
        if t is None:
            errors.append(InputError(f"cannot tell which table this file holds; name it {', '.join(s + '.csv' for s in SPECS)} or pass --table", file=str(f)))
            continue
        if t in big:
            deferred.append((f, t))
            continue
        tables.append(read_csv(f, t))
    for raw in tables:
        errors.extend(raw.errors)
    return tables, errors, deferred


__all__ = ["RawTable", "read_csv", "read_csv_bytes", "read_xlsx", "gather"]
