"""The one formatter: a pinned table of examples (tracker.fmt)."""

import math

import pytest

from tracker import fmt

# Each row: function, SI input, expected text.  SI prefixes: BIPM SI Brochure 9th ed. 2019, Table 7;
# the rounding and spelling choices are ours (the module docstring states them).
TABLE = [
    (fmt.conc, 1.49e-11, "14.9 pM"),
    (fmt.conc, 3.2e-9, "3.2 nM"),
    (fmt.conc, 9.9995e-7, "1 µM"),  # rounded first, then prefixed: never "1e+03 nM"
    (fmt.conc, 4.56e-7, "456 nM"),
    (fmt.conc, 2.5e-3, "2.5 mM"),
    (fmt.conc, 1.5, "1.5 M"),
    (fmt.conc, 3e-16, "0.3 fM"),
    (fmt.conc, 1.23456e-10, "123 pM"),
    (fmt.duration, 45.0, "45 s"),
    (fmt.duration, 3600.0, "60 min"),
    (fmt.duration, 9000.0, "2.5 h"),
    (fmt.duration, 30.85 * 3600, "30.9 h"),
    (fmt.duration, 4 * 86400.0, "4 d"),
    (fmt.duration, math.inf, "∞"),
    (fmt.rate1, 9.05e-6, "9.05e-6 /s"),
    (fmt.rate1, 0.12, "0.12 /s"),
    (fmt.rate1, 1e-3, "1e-3 /s"),
    (fmt.rate2, 1.11e6, "1.11e6 /M/s"),
    (fmt.rate2, 1110000.0, "1.11e6 /M/s"),
    (fmt.rate2, 2.5e4, "2.5e4 /M/s"),
    (fmt.fold, 43.0, "43×"),
    (fmt.fold, 4.6318, "4.63×"),
    (fmt.fold, 1234.0, "1.23e3×"),
    (fmt.pct, 0.45, "45%"),
    (fmt.pct, 0.005, "0.5%"),
    (fmt.sig, 0.000123, "1.23e-4"),
    (fmt.sig, 12345.0, "1.23e4"),
    (fmt.sig, 42.0, "42"),
]


@pytest.mark.parametrize("fn, value, text", TABLE, ids=[f"{f.__name__}-{t}" for f, _, t in TABLE])
def test_table(fn, value, text):
    assert fn(value) == text


@pytest.mark.parametrize("fn", [fmt.conc, fmt.duration, fmt.rate1, fmt.rate2, fmt.fold, fmt.pct, fmt.sig])
def test_missing(fn):
    assert fn(None) == "n/a" and fn(float("nan")) == "n/a" and fn("x", missing="–") == "–"


def test_interval():
    assert fmt.interval(5.62, 9.46, fmt.fold) == " (95% interval 5.62×–9.46×)"
    assert fmt.interval(3600.0, math.inf, fmt.duration) == " (95% interval 60 min–∞)"
    assert fmt.interval(None, None, fmt.fold) == ""


def test_grade_labels_are_one_mapping():
    assert [fmt.grade_label(g) for g in ("high", "moderate", "low", "clear")] == [
        "High risk", "Moderate risk", "Low risk", "No flags"]
    assert fmt.grade_label(None) == fmt.grade_label("bogus") == "Not graded"


def test_cli_and_dashboard_share_the_labels():
    from tracker.ui import theme

    for key, label in fmt.GRADE_LABELS.items():
        assert theme.GRADES[key].label == label
        assert theme.grade_label(key).endswith(label)


def test_every_rate_reads_with_one_unit_spelling():
    # one spelling per unit: no 1/(M·s), no s^-1
    for v in (1e3, 3.3e5, 1e7, 2.2e9):
        assert fmt.rate2(v).endswith(" /M/s") and "+" not in fmt.rate2(v)
    for v in (1e-7, 5e-4, 0.05, 2.0):
        assert fmt.rate1(v).endswith(" /s") and "+" not in fmt.rate1(v)
