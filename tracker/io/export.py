"""Writing the exchange format: CSV files and an ``.xlsx`` workbook of text cells, safe to open in a spreadsheet.

Only writing lives here (no database): :mod:`tracker.services.exporting`
collects the rows and calls :func:`write_csv` / :func:`write_xlsx`.

Formula safety follows the OWASP "CSV Injection" guidance
(https://owasp.org/www-community/attacks/CSV_Injection): a cell that starts
with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return and is not a plain
number is written with a leading single quote, so a spreadsheet shows it as
text instead of running it as a formula (``=HYPERLINK(...)``, ``+cmd|...``,
``@SUM(...)``).  The workbook additionally stores every cell as a string
cell (openpyxl ``data_type = "s"``), so it holds no formula cells at all.
Imports refuse such cells (:func:`formula_like`), so data that came in
through an import never needs the quote and round trips stay byte-identical.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Iterable, Sequence
from pathlib import Path

#: First characters that make a spreadsheet read a cell as a formula (OWASP "CSV Injection").
FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")

#: Unit text written after an SI value that has no text of its own (e.g. a value from a saved fit).
SI_UNIT_TEXT = {"concentration": "M", "time": "s", "rate1": "/s", "rate2": "/M/s", "fraction": ""}


def formula_like(text: str | None) -> bool:
    """True when a spreadsheet could run ``text`` as a formula: it starts with a trigger and is not a plain number."""
    return bool(text) and text[0] in FORMULA_TRIGGERS and _PLAIN_NUMBER.match(text) is None  # type: ignore[index]


def neutralise(text: str | None) -> str | None:
    """``text`` with a leading ``'`` when it is :func:`formula_like` (OWASP "CSV Injection"), else unchanged."""
    return "'" + text if formula_like(text) else text  # type: ignore[operator]


def si_text(si: float, kind: str) -> str:
    """An SI value as text at full precision (``repr``: the shortest text that reads back as the same float)."""
    return f"{float(si)!r} {SI_UNIT_TEXT[kind]}".strip()


def _cells(row: dict[str, str | None], cols: Sequence[str]) -> list[str | None]:
    return [neutralise(row.get(c)) for c in cols]


def write_csv(rows: Iterable[dict[str, str | None]], cols: Sequence[str], path: Path) -> int:
    """Write a header and one line per row (cells neutralised); returns the number of rows."""
    n = 0
    with path.open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for r in rows:
            w.writerow(["" if v is None else v for v in _cells(r, cols)])
            n += 1
    return n


def write_xlsx(tables: dict[str, list[dict[str, str | None]]], columns: dict[str, Sequence[str]], path: Path) -> None:
    """One sheet per table; every cell is a string cell (no formulas), neutralised as in the CSV files."""
    from openpyxl import Workbook
    from openpyxl.cell import WriteOnlyCell

    book = Workbook(write_only=True)
    for name, rows in tables.items():
        ws = book.create_sheet(name)
        cols = columns[name]

        def text_cell(value: str | None, ws=ws) -> WriteOnlyCell | None:
            if value is None:
                return None
            cell = WriteOnlyCell(ws, value=value)
            cell.data_type = "s"  # openpyxl turns a string starting with "=" into a formula unless told otherwise
            return cell

        ws.append([text_cell(c) for c in cols])
        for r in rows:
            ws.append([text_cell(v) for v in _cells(r, cols)])
    path.parent.mkdir(parents=True, exist_ok=True)
    book.save(path)


__all__ = ["FORMULA_TRIGGERS", "SI_UNIT_TEXT", "formula_like", "neutralise", "si_text", "write_csv", "write_xlsx"]
