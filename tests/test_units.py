"""Unit parsing against definitions outside the project.

Sources beside each row:
* SI prefixes (m, µ, n, p, f) - BIPM, The International System of Units (SI Brochure), 9th ed. 2019, Table 7.
* min, h, d as non-SI units accepted for use with the SI - BIPM SI Brochure 9th ed. 2019, Table 8.
* M = mol/L for molar concentration - `common practice` (IUPAC Green Book usage; the symbol is not SI).
* percent as 0.01 - `common practice`.
Compound rates (e.g. /nM/min) follow arithmetically from those definitions (`computed` by hand below).
"""

from __future__ import annotations

import math

import pytest

from tracker.errors import KrtError, UnitError
from tracker.units import kon_warning, parse_quantity, to_si

KNOWN = [
    # text, kind, SI value, source
    ("1 M", "concentration", 1.0, "common practice"),
    ("1 mM", "concentration", 1e-3, "BIPM SI Brochure 9th ed. 2019, Table 7 (milli)"),
    ("1 µM", "concentration", 1e-6, "BIPM SI Brochure 9th ed. 2019, Table 7 (micro)"),
    ("1 uM", "concentration", 1e-6, "common practice: u for µ"),
    ("1 μM", "concentration", 1e-6, "BIPM SI Brochure 9th ed. 2019 (Greek mu, U+03BC)"),
    ("3.2 nM", "concentration", 3.2e-9, "BIPM SI Brochure 9th ed. 2019, Table 7 (nano)"),
    ("3.2nM", "concentration", 3.2e-9, "common practice: no space"),
    ("7 pM", "concentration", 7e-12, "BIPM SI Brochure 9th ed. 2019, Table 7 (pico)"),
    ("2 fM", "concentration", 2e-15, "BIPM SI Brochure 9th ed. 2019, Table 7 (femto)"),
    ("10 umol/L", "concentration", 1e-5, "common practice: mol/L = M"),
    ("1 ms", "time", 1e-3, "BIPM SI Brochure 9th ed. 2019, Table 7 (milli)"),
    ("1 s", "time", 1.0, "BIPM SI Brochure 9th ed. 2019 (base unit)"),
    ("1 min", "time", 60.0, "BIPM SI Brochure 9th ed. 2019, Table 8"),
    ("1 h", "time", 3600.0, "BIPM SI Brochure 9th ed. 2019, Table 8"),
    ("1 d", "time", 86400.0, "BIPM SI Brochure 9th ed. 2019, Table 8"),
    ("2 day", "time", 172800.0, "BIPM SI Brochure 9th ed. 2019, Table 8"),
    ("0.01 /s", "rate1", 0.01, "BIPM SI Brochure 9th ed. 2019 (s^-1)"),
    ("1e-3 s^-1", "rate1", 1e-3, "BIPM SI Brochure 9th ed. 2019 (s^-1)"),
    ("0.2 /min", "rate1", 0.2 / 60, "computed from Table 8: 1 min = 60 s"),
    ("1 /h", "rate1", 1 / 3600, "computed from Table 8: 1 h = 3600 s"),
    ("1e6 /M/s", "rate2", 1e6, "common practice"),
    ("1e6 M^-1 s^-1", "rate2", 1e6, "common practice"),
    ("1e6 M⁻¹ s⁻¹", "rate2", 1e6, "common practice (superscript minus)"),
    ("1e6 1/(M*s)", "rate2", 1e6, "common practice"),
    ("1 /nM/min", "rate2", 1.6667e7, "computed: 1e9 /M per /nM over 60 s per min = 1.6667e7 /M/s"),
    ("1 /uM/s", "rate2", 1e6, "computed: 1e6 /M per /uM"),
    ("0.3", "fraction", 0.3, "common practice"),
    ("30 %", "fraction", 0.3, "common practice: percent = 0.01"),
]


@pytest.mark.parametrize("text,kind,expected,source", KNOWN, ids=[k[0] for k in KNOWN])
def test_known_quantities_convert_to_the_published_si_value(text, kind, expected, source):
    q = parse_quantity(text, kind)
    assert q.si == pytest.approx(expected, rel=1e-4), source
    assert q.kind == kind


def test_the_unit_text_is_kept_with_the_parsed_quantity():
    assert parse_quantity("3.2 nM", "concentration").unit == "nM"


REFUSED = [
    ("3 nQ", "concentration", "unknown unit"),
    ("3 parsecs", "time", "unknown unit"),
    ("1 h", "concentration", "is a time, expected a concentration"),
    ("5 nM", "time", "is a concentration, expected a time"),
    ("1e6 /s", "rate2", "expected a second-order rate"),
    ("0 nM", "concentration", "must be positive"),
    ("-2 nM", "concentration", "must be positive"),
    ("nan nM", "concentration", "not a number"),
    ("inf nM", "concentration", "not a number"),
    ("", "concentration", "empty"),
    ("12", "concentration", "missing unit"),
    ("2e10 /M/s", "rate2", "diffusion limit"),
    ("1 /pM/s", "rate2", "diffusion limit"),  # 1e12 /M/s, computed
    ("2", "fraction", "outside 0-1"),
]


@pytest.mark.parametrize("text,kind,needle", REFUSED, ids=[f"{r[0] or 'empty'}-{r[1]}" for r in REFUSED])
def test_bad_quantities_are_refused_with_a_clear_one_line_message(text, kind, needle):
    with pytest.raises(UnitError) as info:
        parse_quantity(text, kind)
    assert needle in str(info.value)
    assert isinstance(info.value, KrtError) and isinstance(info.value, ValueError)
    assert "\n" not in info.value.one_line()


def test_a_nan_float_is_refused_where_a_positive_value_is_required():
    with pytest.raises(UnitError):
        parse_quantity(math.nan, "fraction")


def test_kon_above_1e9_warns_but_is_accepted_and_above_1e10_is_refused():
    # Smoluchowski diffusion limit of order 1e9-1e10 /M/s (from memory, see docs/REFERENCES.md Plausibility)
    assert to_si("2e9 /M/s", "rate2") == pytest.approx(2e9)
    assert kon_warning(2e9) is not None
    assert kon_warning(1e7) is None
    with pytest.raises(UnitError):
        to_si("1.1e10 /M/s", "rate2")
