"""Column-wise parsing of quantity text: one parse per distinct cell text, one unit lookup per distinct unit.

:func:`parse_quantity_column` gives the same answers as
:func:`tracker.units.parse_quantity` cell by cell (a test checks this): it
uses the same number pattern and ``float``, but factorises the column first,
so 50,000 cells cost one regex match per distinct text (``"30 min"`` is
parsed once however often it occurs), a handful of
:func:`tracker.units.unit_factor` calls and numpy arithmetic for the ranges.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import UnitError
from ..fmt import rate2
from ..units import _NUMBER as _NUMBER_RE  # the scalar parser's own pattern
from ..units import BOUNDS, KON_MAX, KON_WARN, bound_message, unit_factor


@dataclass
class ColumnResult:
    """SI floats (NaN where the cell is empty or bad) and the problems found, by row position."""

    si: np.ndarray
    errors: list[tuple[int, str]] = field(default_factory=list)
    warnings: list[tuple[int, str]] = field(default_factory=list)


def parse_quantity_column(
    texts: pd.Series,
    kind: str,
    *,
    positive: bool = True,
    low: float | None = None,
    high: float | None = None,
    bounded: bool = True,
) -> ColumnResult:
    """Parse a column of quantity text (``None``/NA = empty cell) of one ``kind``.

    ``positive`` refuses zero and negative values; ``low``/``high`` bound the SI
    value (inclusive).  Fractions must lie in 0-1.5 and second-order rates at or
    below the diffusion limit, as in :func:`tracker.units.parse_quantity`; a kon
    above ~1e9 /M/s gives a warning.  ``bounded`` refuses absurd magnitudes of the
    kind (:data:`tracker.units.BOUNDS`: a concentration above 1 M, a time above a
    year, ...).
    """
    texts = texts.reset_index(drop=True)
    n = len(texts)
    si = np.full(n, np.nan)
    out = ColumnResult(si=si)
    cells = texts.to_numpy(dtype=object)
    present = ~pd.isna(cells)
    if not present.any():
        return out
    idx = np.flatnonzero(present)
    # every distinct text is parsed once (a column of 50,000 cells holds a few thousand distinct values at most)
    codes, uniques = pd.factorize(cells[idx])
    u_number: list[float] = []
    u_unit: list[str] = []
    u_bad = np.zeros(len(uniques), dtype=bool)
    for j, text in enumerate(uniques.tolist()):
        m = _NUMBER_RE.match(str(text))
        if m is None:
            u_bad[j] = True
            u_number.append(np.nan)
            u_unit.append("")
        else:
            u_number.append(float(m.group(1)))  # the regex admits only float literals (as split_number)
            u_unit.append(m.group(2) or "")
    bad_number = u_bad[codes]
    for pos in idx[bad_number]:
        raw = str(texts.iloc[pos]).strip()
        word = raw.split()[0].lower() if raw.split() else raw
        if word in ("nan", "inf", "-inf", "+inf", "infinity"):
            out.errors.append((int(pos), f"{raw!r} is not a finite number"))
        else:
            out.errors.append((int(pos), f"not a number: {raw!r} (expected e.g. '{_EXAMPLE[kind]}')"))
    ok = ~bad_number
    ok_idx = idx[ok]
    ok_codes = codes[ok]
    values = np.asarray(u_number, dtype=float)[ok_codes]
    # one unit lookup per distinct unit text
    u_factor = np.full(len(uniques), np.nan)
    u_unit_arr = np.asarray(u_unit, dtype=object)
    unit_errors: dict[str, str] = {}
    for unit in dict.fromkeys(u for u, b in zip(u_unit, u_bad) if not b):
        try:
            f = unit_factor(unit, kind)
        except UnitError as exc:
            unit_errors[unit] = str(exc).replace(f" in {unit!r}", "")
            continue
        u_factor[u_unit_arr == unit] = f
    factors = u_factor[ok_codes]
    if unit_errors:
        row_units = u_unit_arr[ok_codes]
        for unit, msg in unit_errors.items():
            for pos in ok_idx[row_units == unit]:
                out.errors.append((int(pos), f"{msg} (cell {str(texts.iloc[pos]).strip()!r})"))
    with np.errstate(over="ignore", invalid="ignore"):
        vals = values * factors
    good_unit = np.isfinite(factors)
    finite = np.isfinite(values) & np.isfinite(vals)
    checked = good_unit & finite
    problem = good_unit & ~finite
    if positive:
        problem |= checked & ~(vals > 0)
    if kind == "fraction":
        problem |= checked & ~((vals >= 0) & (vals <= 1.5))
    if kind == "rate2":
        problem |= checked & (vals > KON_MAX)
    if low is not None:
        problem |= checked & (vals < low)
    if high is not None:
        problem |= checked & (vals > high)
    if bounded:
        b_low, b_high = BOUNDS[kind]
        problem |= checked & ((vals > b_high) | ((vals > 0) & (vals < b_low)))
    for j in np.flatnonzero(problem):
        pos = int(ok_idx[j])
        raw = str(texts.iloc[pos]).strip()
        if not finite[j]:
            out.errors.append((pos, f"{raw!r} is not a finite number"))
        else:
            msg = _check_value(vals[j], kind, positive, low, high, raw)
            out.errors.append((pos, msg if msg is not None else bound_message(raw, vals[j], kind) or f"{raw!r} is out of range"))
    keep = good_unit & ~problem
    si[ok_idx[keep]] = vals[keep]
    if kind == "rate2":
        for j in np.flatnonzero(keep & (vals > KON_WARN)):
            v = vals[j]
            out.warnings.append((int(ok_idx[j]), f"kon {rate2(v)} is above ~1e9 /M/s, near the diffusion limit; check the measurement"))
    out.errors.sort()
    return out


def _check_value(v: float, kind: str, positive: bool, low: float | None, high: float | None, raw: str) -> str | None:
    if positive and not v > 0:
        return f"value must be positive, got {raw!r}"
    if kind == "fraction" and not 0 <= v <= 1.5:
        return f"fraction {raw!r} is outside 0-1"
    if kind == "rate2" and v > KON_MAX:
        return f"kon {rate2(v)} exceeds the diffusion limit (~1e10 /M/s, Smoluchowski); check the unit"
    if low is not None and v < low:
        return f"{raw!r} is below the allowed minimum {low:g}"
    if high is not None and v > high:
        return f"{raw!r} is above the allowed maximum {high:g}"
    return None


_EXAMPLE = {"concentration": "10 nM", "time": "1 h", "rate1": "0.001 /s", "rate2": "1e6 /M/s", "fraction": "0.3"}

__all__ = ["parse_quantity_column", "ColumnResult"]
