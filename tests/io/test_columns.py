"""The column-wise quantity parser agrees with the scalar one in tracker.units, cell by cell."""

from __future__ import annotations

import pandas as pd
import pytest

from tracker.errors import UnitError
from tracker.io.columns import parse_quantity_column
from tracker.units import parse_quantity

CELLS = {
    "concentration": ["3.2 nM", "3.2nM", "1 µM", "10 umol/L", "8e-9 M", "0 nM", "-1 nM", "nan nM", "3 nQ", "1 h", "12", "abc", "1e999 nM"],
    "time": ["30 min", "1 h", "2 day", "45 s", "5 nM", "0 s"],
    "rate1": ["1e-3 /s", "0.2 /min", "1e-3 s^-1", "1 /M/s"],
    "rate2": ["1e6 /M/s", "0.06 /nM/min", "2e9 /M/s", "2e10 /M/s", "1e6 M^-1 s^-1"],
    "fraction": ["0.3", "30 %", "2", "-0.1"],
}


@pytest.mark.parametrize("kind", list(CELLS))
def test_the_column_parser_matches_parse_quantity_for_every_cell(kind):
    cells = CELLS[kind]
    res = parse_quantity_column(pd.Series(cells, dtype=object), kind)
    bad = {pos for pos, _ in res.errors}
    for i, text in enumerate(cells):
        try:
            expected = parse_quantity(text, kind).si
        except UnitError:
            assert i in bad, text
            continue
        assert i not in bad, (text, res.errors)
        assert res.si[i] == pytest.approx(expected, rel=1e-12), text


def test_empty_cells_are_nan_without_errors():
    res = parse_quantity_column(pd.Series([None, "1 nM", None], dtype=object), "concentration")
    assert res.errors == [] and pd.isna(res.si[0]) and res.si[1] == pytest.approx(1e-9)
