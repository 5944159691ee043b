"""Fuzzed quantity text against the unit parser: every bad cell is one clean UnitError, never another exception.

Hypothesis generates cells that are bad by construction (no number, a unit of
the wrong dimension, an unknown unit, a broken unit expression, a non-finite,
zero or negative value, a fraction out of range, a kon faster than diffusion),
plus arbitrary text.  The cell-by-cell parser (:func:`tracker.units.parse_quantity`)
and the column parser the importer uses (:func:`tracker.io.columns.parse_quantity_column`)
must both refuse every bad cell and agree with each other on arbitrary text.
The diffusion ceiling of ~1e10 /M/s is the Smoluchowski limit (from memory;
see docs/REFERENCES.md).  Seeds are fixed (``derandomize``), so CI sees the same cases.
"""

from __future__ import annotations

import math

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracker.errors import KrtError, UnitError
from tracker.io.columns import parse_quantity_column
from tracker.units import ATOMS, KINDS, KON_MAX, parse_quantity

KIND_NAMES = tuple(KINDS)
pytestmark = pytest.mark.slow  # hypothesis fuzzing: CI and --run-slow

FUZZ = settings(derandomize=True, database=None, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])

GOOD_UNIT = {"concentration": ["nM", "uM", "µM", "M", "pM", "umol/L"], "time": ["s", "min", "h", "day"],
             "rate1": ["/s", "s^-1", "/min", "1/h"], "rate2": ["/M/s", "M^-1 s^-1", "/nM/min", "1/(M*s)"]}
WRONG_UNIT = {"concentration": GOOD_UNIT["time"] + GOOD_UNIT["rate1"] + GOOD_UNIT["rate2"] + ["M*s", "M^2", "%"],
              "time": GOOD_UNIT["concentration"] + GOOD_UNIT["rate1"] + ["s^2", "%"],
              "rate1": GOOD_UNIT["time"] + GOOD_UNIT["concentration"] + GOOD_UNIT["rate2"] + ["%"],
              "rate2": GOOD_UNIT["rate1"] + GOOD_UNIT["concentration"] + ["M/s", "/M", "%"],
              "fraction": ["nM", "s", "/s", "/M/s", "min", "percent", "%%"]}
BROKEN_EXPR = ["(M*s", "M*s)", "/", "M/", "M^", "M^x", "M^-", "**M", "M//s", "1/(", "()", "n M", "nM nM s", "µ", "s-", "M^1.5"]

numbers = st.one_of(st.integers(1, 10**6).map(str), st.floats(1e-6, 1e6, allow_nan=False).map(lambda v: f"{v:.6g}"),
                    st.sampled_from(["1e-3", "2.5E+2", ".5", "3.", "+7"]))
unknown_atoms = st.text(alphabet="abcdefgijklnopqrtuvwxyzABCDEFGHIJKLNOPQRTUVWXYZ", min_size=1, max_size=6).filter(lambda a: a not in ATOMS)


def _finite_ok(kind: str, q) -> bool:
    return math.isfinite(q.si) and q.si > 0 and (kind != "fraction" or q.si <= 1.5) and (kind != "rate2" or q.si <= KON_MAX)


@st.composite
def bad_cells(draw):
    """``(kind, text)`` where ``text`` is not an acceptable quantity of ``kind``, by construction."""
    kind = draw(st.sampled_from(KIND_NAMES))
    how = draw(st.sampled_from(["no-number", "wrong-dimension", "unknown-unit", "broken", "non-finite", "not-positive",
                                "fraction-range", "faster-than-diffusion", "missing-unit"]))
    n = draw(numbers)
    if how == "no-number":
        lead = draw(st.text(alphabet=st.characters(blacklist_categories=("Nd", "Cs"), blacklist_characters="+-.\x00"), min_size=1, max_size=12)
                    .filter(lambda s: s.strip() and not s.strip()[0].isdigit()))
        return kind, f"{lead} {n}"
    if how == "wrong-dimension":
        return kind, f"{n} {draw(st.sampled_from(WRONG_UNIT[kind]))}"
    if how == "unknown-unit":
        return kind, f"{n} {draw(unknown_atoms)}"
    if how == "broken":
        return kind, f"{n} {draw(st.sampled_from(BROKEN_EXPR))}"
    if how == "non-finite":
        return kind, f"{draw(st.sampled_from(['nan', 'NaN', 'inf', '-inf', 'Infinity', '1e999', '-1e999']))} {draw(st.sampled_from(GOOD_UNIT.get(kind, [''])))}".strip()
    if how == "not-positive":
        return kind, f"{draw(st.sampled_from(['0', '-0', '-1', '-2.5e-3', '0.0']))} {draw(st.sampled_from(GOOD_UNIT.get(kind, [''])))}".strip()
    if how == "fraction-range":
        return "fraction", draw(st.sampled_from([f"{v:g}" for v in (1.6, 2, 10, 1e3)] + ["151 %", "200%", "1e4 %"]))
    if how == "faster-than-diffusion":
        return "rate2", f"{draw(st.floats(1.01e10, 1e15)):.4g} /M/s"
    return ("concentration" if kind == "fraction" else kind), n  # a bare number where a unit is required


@settings(FUZZ, max_examples=700)
@given(bad_cells())
def test_every_bad_quantity_cell_is_one_clean_unit_error_from_both_parsers(case):
    kind, cell = case
    try:
        q = parse_quantity(cell, kind)
    except UnitError as exc:
        message = str(exc)
        assert message and "\n" not in message
    else:
        raise AssertionError(f"{cell!r} accepted as {kind}: {q}")
    col = parse_quantity_column(pd.Series([cell, None], dtype=object), kind)
    assert [pos for pos, _ in col.errors] == [0], (cell, col.errors)
    assert math.isnan(col.si[0]) and all("\n" not in m for _, m in col.errors)


@settings(FUZZ, max_examples=300)
@given(kind=st.sampled_from(KIND_NAMES), cell=st.text(max_size=24))
def test_arbitrary_text_is_either_a_valid_quantity_or_a_unit_error_and_both_parsers_agree(kind, cell):
    try:
        q = parse_quantity(cell, kind)
        single = q.si
    except UnitError as exc:
        assert isinstance(exc, KrtError) and "\n" not in str(exc)
        single = None
    else:
        assert _finite_ok(kind, q), (cell, q)
    present = cell if cell.strip() else None  # the importer hands blank cells over as missing, not as text
    col = parse_quantity_column(pd.Series([present], dtype=object), kind)
    if present is None:
        assert col.errors == [] and math.isnan(col.si[0])
        return
    if single is None:
        assert [p for p, _ in col.errors] == [0], (cell, col.errors)
    else:
        assert col.errors == [] and col.si[0] == single, (cell, single, col.si[0], col.errors)
