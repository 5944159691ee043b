"""The one number formatter: SI floats in, the text people read out.

Every front end (CLI, dashboard, review pack) and the finding texts of the
rules format quantities here, so a number reads the same wherever it appears:

=============  ===================  =====================================
quantity       function             examples
=============  ===================  =====================================
concentration  :func:`conc`         ``14.9 pM``, ``3.2 nM``, ``1 µM``
time           :func:`duration`     ``45 s``, ``60 min``, ``2.5 h``, ``3 d``
koff, kobs     :func:`rate1`        ``9.05e-6 /s``, ``0.12 /s``
kon            :func:`rate2`        ``1.11e6 /M/s``
fold, ratio    :func:`fold`         ``43×``, ``4.63×``
fraction       :func:`pct`          ``45%``, ``0.5%``
=============  ===================  =====================================

Rules: three significant figures with trailing zeros dropped; SI prefixes
chosen after rounding (999.95 nM reads ``1 µM``); one spelling per unit
(:data:`UNITS`); very large or small rates in compact scientific notation
(``1.11e6``, never ``1.11e+06`` or ``1110000``).  A missing or non-finite
value reads ``n/a`` (or the caller's ``missing`` text); an infinite duration
reads ``∞``.

Grade labels live here too (:data:`GRADE_LABELS`): the CLI and the dashboard
show the same words for the grading layer's ``high``/``moderate``/``low``/``clear``.

Same layer as :mod:`tracker.units`: imports nothing from the tracker.
"""

from __future__ import annotations

import math
from typing import Any, Callable

#: One spelling per unit, for column headers and axis titles.
UNITS: dict[str, str] = {
    "concentration": "nM",  # tables and charts show concentrations in nM
    "time": "h",  # tables and charts show times in h
    "rate1": "/s",
    "rate2": "/M/s",
}

#: The grading layer's values -> the words every front end shows (worst first).
GRADE_LABELS: dict[str, str] = {
    "high": "High risk",
    "moderate": "Moderate risk",
    "low": "Low risk",
    "clear": "No flags",
}
UNGRADED_LABEL = "Not graded"

_PREFIXES = ((1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"), (1e-12, "p"), (1e-15, "f"))


def _finite(x: Any) -> float | None:
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def sig(x: Any, digits: int = 3, missing: str = "n/a") -> str:
    """``x`` to ``digits`` significant figures, trailing zeros dropped, no ``e+06`` noise."""
    f = _finite(x)
    if f is None:
        return missing
    if f == 0:
        return "0"
    a = abs(f)
    if 1e-3 <= a < 1e5:
        return f"{f:.{digits}g}" if "e" not in f"{f:.{digits}g}" else _sci(f, digits)
    return _sci(f, digits)


def _sci(f: float, digits: int = 3) -> str:
    mant, exp = f"{f:.{digits - 1}e}".split("e")
    if "." in mant:
        mant = mant.rstrip("0").rstrip(".")
    return f"{mant}e{int(exp)}"


def conc(m: Any, missing: str = "n/a", digits: int = 3) -> str:
    """A molar concentration with the SI prefix that keeps 1-999 before the unit: ``14.9 pM``."""
    f = _finite(m)
    if f is None:
        return missing
    if f == 0:
        return "0 M"
    r = float(f"{f:.{digits}g}")  # round first, so 999.95 nM becomes 1 µM
    for factor, prefix in _PREFIXES:
        if abs(r) >= factor:
            return f"{r / factor:.{digits}g} {prefix}M"
    return f"{r / 1e-15:.{digits}g} fM"


def duration(s: Any, missing: str = "n/a", digits: int = 3) -> str:
    """Seconds as ``s`` (< 2 min), ``min`` (< 2 h), ``h`` (< 3 d) or ``d``; ``∞`` for infinity."""
    try:
        f = float(s)
    except (TypeError, ValueError):
        return missing
    if math.isnan(f):
        return missing
    if math.isinf(f):
        return "∞" if f > 0 else "-∞"
    a = abs(f)
    if a < 120:
        return f"{f:.{digits}g} s"
    if a < 2 * 3600:
        return f"{f / 60:.{digits}g} min"
    if a < 72 * 3600:
        return f"{f / 3600:.{digits}g} h"
    return f"{f / 86400:.{digits}g} d"


def _rate(k: Any, unit: str, missing: str) -> str:
    f = _finite(k)
    if f is None:
        return missing
    a = abs(f)
    text = f"{f:.3g}" if 1e-2 <= a < 1e3 else _sci(f)
    return f"{text} {unit}"


def rate1(k: Any, missing: str = "n/a") -> str:
    """A first-order rate (koff, kobs): ``9.05e-6 /s``, ``0.12 /s``."""
    return _rate(k, UNITS["rate1"], missing)


def rate2(k: Any, missing: str = "n/a") -> str:
    """A second-order rate (kon): ``1.11e6 /M/s``."""
    return _rate(k, UNITS["rate2"], missing)


def fold(x: Any, missing: str = "n/a") -> str:
    """A ratio: ``43×``, ``4.63×``, ``1.2e3×``."""
    f = _finite(x)
    return missing if f is None else f"{sig(f)}×"


def pct(x: Any, missing: str = "n/a") -> str:
    """A fraction as a percentage, 0 decimals from 1% up: ``45%``, ``0.5%``."""
    f = _finite(x)
    if f is None:
        return missing
    p = 100 * f
    return f"{p:.0f}%" if abs(p) >= 1 or p == 0 else f"{p:.1g}%"


def interval(lo: Any, hi: Any, fn: Callable[[Any], str]) -> str:
    """``' (95% interval 5.6×–9.5×)'`` for a 95% interval; an open end reads ``0`` or ``∞``; ``''`` without one."""
    flo, fhi = _finite(lo), _finite(hi)
    if lo is None or hi is None or (flo is None and fhi is None):
        return ""
    left = fn(flo) if flo is not None else "0"
    right = fn(fhi) if fhi is not None else "∞"
    return f" (95% interval {left}–{right})"


def grade_label(value: Any) -> str:
    """``'High risk'`` for ``'high'``; ``'Not graded'`` for anything the grader does not return."""
    if value is None or (isinstance(value, float) and value != value):
        return UNGRADED_LABEL
    return GRADE_LABELS.get(str(value).strip().lower(), UNGRADED_LABEL)


__all__ = [
    "UNITS", "GRADE_LABELS", "UNGRADED_LABEL", "sig", "conc", "duration", "rate1", "rate2", "fold", "pct",
    "interval", "grade_label",
]
