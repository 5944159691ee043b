"""The one unit module: text quantities in, SI floats out.

Quantities are parsed once, at the boundary (import, CLI options, dashboard
inputs); everything inside the tracker works in plain SI floats:

============  =====================  ==========================
kind          SI unit                examples accepted
============  =====================  ==========================
concentration M (mol/L)              ``3.2 nM``, ``3.2nM``, ``10 umol/L``
time          s                      ``10 min``, ``6 h``, ``2 day``
rate1         1/s                    ``0.01 /s``, ``1e-3 s^-1``, ``0.2 /min``
rate2         1/(M*s)                ``3e6 /M/s``, ``1e6 M^-1 s^-1``, ``0.1 /nM/min``
fraction      1                      ``0.3``, ``30 %``
============  =====================  ==========================

A unit expression is a product of unit atoms with optional integer exponents
(``M^-1``, ``s-1``, ``M⁻¹``); ``/`` divides by the next factor or group and
parentheses group (``1/(M*s)``).  The dimension is checked against the kind,
so a time in a concentration column is refused with a clear message.

Chosen over pint for this job: the vocabulary is small and fixed, column
conversion is one multiply per distinct unit string, and errors read the way
a bench scientist writes units (common practice in assay reports).
"""

from __future__ import annotations

import math
import re
from typing import Any
from dataclasses import dataclass

from . import fmt
from .errors import UnitError

# dimension = (concentration exponent, time exponent)
KINDS: dict[str, tuple[int, int]] = {
    "concentration": (1, 0),
    "time": (0, 1),
    "rate1": (0, -1),
    "rate2": (-1, -1),
    "fraction": (0, 0),
}
SI_NAMES = {"concentration": "M", "time": "s", "rate1": "1/s", "rate2": "1/(M*s)", "fraction": ""}
KIND_WORDS = {
    "concentration": "a concentration",
    "time": "a time",
    "rate1": "a first-order rate",
    "rate2": "a second-order rate",
    "fraction": "a fraction",
}

_CONC = {"M": 1.0, "mM": 1e-3, "uM": 1e-6, "µM": 1e-6, "μM": 1e-6, "nM": 1e-9, "pM": 1e-12, "fM": 1e-15}
_TIME = {
    "ms": 1e-3, "s": 1.0, "sec": 1.0, "secs": 1.0, "second": 1.0, "seconds": 1.0,
    "min": 60.0, "mins": 60.0, "minute": 60.0, "minutes": 60.0,
    "h": 3600.0, "hr": 3600.0, "hrs": 3600.0, "hour": 3600.0, "hours": 3600.0,
    "d": 86400.0, "day": 86400.0, "days": 86400.0,
}
ATOMS: dict[str, tuple[float, tuple[int, int]]] = {
    **{k: (v, (1, 0)) for k, v in _CONC.items()},
    **{k: (v, (0, 1)) for k, v in _TIME.items()},
}

KON_WARN = 1e9  # /M/s: above practical ceilings for small molecules (from memory, see docs/REFERENCES.md)
KON_MAX = 1e10  # /M/s: Smoluchowski diffusion limit, order 1e9-1e10 /M/s (from memory)

YEAR_S = 365.25 * 86400.0
#: Plausible range (SI, inclusive) of every quantity of a kind; values outside are refused as absurd magnitudes
#: (a typo or a wrong unit), by kind, so every quantity column of the format is covered, new ones included.
#: Concentrations above 1 M exceed the solubility of a drug-like compound and below 1e-18 M a well holds no
#: molecule (common practice); times (incubations, half-lives, residence times, intervals) lie between 1 µs and
#: one year, and first-order rates are their reciprocals; second-order rates lie between 1e-3 /M/s and the
#: diffusion limit (KON_MAX).  Fractions keep their 0-1.5 check.
BOUNDS: dict[str, tuple[float, float]] = {
    "concentration": (1e-18, 1.0),
    "time": (1e-6, YEAR_S),
    "rate1": (1.0 / YEAR_S, 1e6),
    "rate2": (1e-3, KON_MAX),
    "fraction": (0.0, 1.5),
}
_BOUND_WORDS = {
    "concentration": ("1e-18 M", "1 M"),
    "time": ("1 µs", "one year"),
    "rate1": ("1 per year", "1e6 /s"),
    "rate2": ("1e-3 /M/s", "1e10 /M/s"),
    "fraction": ("0", "1.5"),
}


def bound_message(raw: str, si: float, kind: str) -> str | None:
    """Why ``si`` (the value of cell text ``raw``) is an absurd magnitude for ``kind``, or ``None`` when plausible.

    Zero and negative values are left to the positivity checks.
    """
    low, high = BOUNDS[kind]
    if si > high:
        return f"{raw!r} is above the plausible maximum for {KIND_WORDS[kind]} ({_BOUND_WORDS[kind][1]}); check the value and unit"
    if 0 < si < low:
        return f"{raw!r} is below the plausible minimum for {KIND_WORDS[kind]} ({_BOUND_WORDS[kind][0]}); check the value and unit"
    return None


_NUMBER = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(.*?)\s*$")
_MOL_PER_L = re.compile(r"\b([munpfµμ]?)mol\s*/\s*[lL]\b")
_SUPERSCRIPT = str.maketrans({"⁻": "-", "¹": "1", "²": "2", "³": "3", "·": "*", "×": "*"})
_TOKEN = re.compile(r"\s*(?:(?P<atom>[A-Za-zµμ]+)(?:\s*\^\s*(?P<exp1>[+-]?\d+)|(?P<exp2>-\d+))?|(?P<one>1)(?![\d.])|(?P<op>[*/()]))")


@dataclass(frozen=True)
class Quantity:
    """A parsed quantity: its SI value and the unit text it arrived with."""

    si: float
    unit: str
    kind: str


def _tokens(expr: str) -> list[tuple[str, object]]:
    out: list[tuple[str, object]] = []
    pos = 0
    expr = expr.strip()
    while pos < len(expr):
        m = _TOKEN.match(expr, pos)
        if not m or m.end() == pos:
            raise UnitError(f"cannot read unit {expr!r} near {expr[pos:]!r}")
        if m.group("atom"):
            exp = m.group("exp1") or m.group("exp2") or "1"
            out.append(("atom", (m.group("atom"), int(exp))))
        elif m.group("one"):
            out.append(("one", None))
        else:
            out.append(("op", m.group("op")))
        pos = m.end()
    return out


def _parse_expr(tokens: list[tuple[str, Any]], i: int, text: str) -> tuple[float, tuple[int, int], int]:
    factor, dim = 1.0, (0, 0)
    first = True
    while i < len(tokens):
        kind, val = tokens[i]
        if kind == "op" and val == ")":
            break
        sign = 1
        if kind == "op" and val in "*/":
            sign = -1 if val == "/" else 1
            i += 1
            if i >= len(tokens):
                raise UnitError(f"unit {text!r} ends with {val!r}")
            kind, val = tokens[i]
        elif not first and kind == "op" and val == "(":
            pass  # implicit multiplication before a group
        f, d, i = _parse_term(tokens, i, text)
        factor *= f**sign
        dim = (dim[0] + sign * d[0], dim[1] + sign * d[1])
        first = False
    return factor, dim, i


def _parse_term(tokens: list[tuple[str, Any]], i: int, text: str) -> tuple[float, tuple[int, int], int]:
    kind, val = tokens[i]
    if kind == "one":
        return 1.0, (0, 0), i + 1
    if kind == "atom":
        name, exp = val
        if name not in ATOMS:
            raise UnitError(f"unknown unit {name!r} in {text!r}")
        f, d = ATOMS[name]
        return f**exp, (d[0] * exp, d[1] * exp), i + 1
    if kind == "op" and val == "(":
        f, d, j = _parse_expr(tokens, i + 1, text)
        if j >= len(tokens) or tokens[j] != ("op", ")"):
            raise UnitError(f"unbalanced parenthesis in unit {text!r}")
        return f, d, j + 1
    raise UnitError(f"cannot read unit {text!r}")


def unit_factor(unit: str, kind: str) -> float:
    """SI factor of ``unit`` for a quantity of ``kind`` (``value_si = value * factor``)."""
    if kind not in KINDS:
        raise ValueError(f"unknown quantity kind {kind!r}")
    text = unit.strip()
    if kind == "fraction":
        if text in ("", "1"):
            return 1.0
        if text == "%":
            return 0.01
        raise UnitError(f"unit {unit!r} is not a fraction (give a plain number or %)")
    if not text:
        raise UnitError(f"missing unit: give {KIND_WORDS[kind]} with its unit, e.g. '{_EXAMPLE[kind]}'")
    norm = _MOL_PER_L.sub(lambda m: (m.group(1) or "") + "M", text.translate(_SUPERSCRIPT))
    if norm.startswith("/"):
        norm = "1" + norm
    tokens = _tokens(norm)
    if not tokens:
        raise UnitError(f"missing unit in {unit!r}")
    factor, dim, j = _parse_expr(tokens, 0, unit)
    if j != len(tokens):
        raise UnitError(f"unbalanced parenthesis in unit {unit!r}")
    if dim != KINDS[kind]:
        found = _dimension_word(dim)
        raise UnitError(f"unit {unit!r} is {found}, expected {KIND_WORDS[kind]}")
    return factor


_EXAMPLE = {"concentration": "10 nM", "time": "1 h", "rate1": "0.001 /s", "rate2": "1e6 /M/s", "fraction": "0.3"}


def _dimension_word(dim: tuple[int, int]) -> str:
    for kind, d in KINDS.items():
        if d == dim:
            return KIND_WORDS[kind]
    return f"of dimension M^{dim[0]} s^{dim[1]}"


def split_number(text: str) -> tuple[float, str]:
    """Split ``'3.2 nM'`` into ``(3.2, 'nM')``; refuses text without a leading number."""
    m = _NUMBER.match(str(text))
    if not m:
        raise UnitError(f"not a number: {str(text).strip()!r}")
    return float(m.group(1)), m.group(2)


def parse_quantity(text: str | float | int, kind: str, *, positive: bool = True, default_unit: str | None = None) -> Quantity:
    """Parse ``'3.2 nM'`` (or ``3.2`` with ``default_unit``) into a :class:`Quantity` in SI.

    ``positive`` refuses zero and negative values.  A second-order rate above
    :data:`KON_MAX` is refused as faster than diffusion.
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value, unit = float(text), ""
    else:
        raw = str(text).strip()
        if not raw:
            raise UnitError("empty value")
        value, unit = split_number(raw)
    if not math.isfinite(value):
        raise UnitError(f"not a finite number: {text!r}")
    if not unit and default_unit is not None:
        unit = default_unit
    si = value * unit_factor(unit, kind)
    if positive and not si > 0:
        raise UnitError(f"value must be positive, got {str(text).strip()!r}")
    if kind == "fraction" and not 0 <= si <= 1.5:
        raise UnitError(f"fraction {text!r} is outside 0-1")
    if kind == "rate2" and si > KON_MAX:
        raise UnitError(
            f"kon {fmt.rate2(si)} exceeds the diffusion limit (~1e10 /M/s, Smoluchowski); check the unit"
        )
    return Quantity(si=si, unit=unit, kind=kind)


def to_si(text: str | float, kind: str, **kw: Any) -> float:
    """Shorthand for ``parse_quantity(text, kind).si``."""
    return parse_quantity(text, kind, **kw).si


def kon_warning(kon_si: float) -> str | None:
    """A warning for a kon above practical ceilings, or ``None``."""
    if kon_si > KON_WARN:
        return f"kon {fmt.rate2(kon_si)} is above ~1e9 /M/s, near the diffusion limit; check the measurement"
    return None


# ---------------------------------------------------------------- formatting
# Formatting lives in tracker.fmt (the one formatter); these names stay for callers in flight.
from .fmt import conc as fmt_conc  # noqa: E402
from .fmt import duration as fmt_time  # noqa: E402
from .fmt import rate1 as fmt_rate1  # noqa: E402
from .fmt import rate2 as fmt_rate2  # noqa: E402
