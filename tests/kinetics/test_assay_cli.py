"""``krt simulate apparent-affinity`` and ``krt simulate ki-shift-bounds`` end to end.

Happy paths are compared with the library functions (themselves checked against solve_ivp in
test_assay.py) and with the trade facts there (`common practice`); bad input must give one line
on stderr, a non-zero exit and no traceback.
"""

from __future__ import annotations

import math

import pytest

from tracker.kinetics import assay

H = 3600.0


def test_apparent_affinity_json_reports_the_saturation_reading_and_minimum_incubation(krt_cli):
    d = krt_cli.json(["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "10 min"])
    app, fold = assay.apparent_affinity(1e-9, 1 / (6 * H), 600)
    assert d["apparent_kd_M"] == pytest.approx(float(app), rel=1e-12)
    assert d["fold_shift"] == pytest.approx(float(fold), rel=1e-12)
    assert d["min_incubation_s"] == pytest.approx(float(assay.min_incubation(1e-9, 1 / (6 * H))), rel=1e-12)
    assert d["rule_of_thumb_incubation_s"] == pytest.approx(12 * H)  # common practice: 2 x RT
    assert d["within_tolerance"] is False and d["near_assay_floor"] is True
    assert "not dosing advice" in d["caution"]


def test_apparent_affinity_accepts_any_two_kinetic_constants(krt_cli):
    koff = 1 / (6 * H)
    a = krt_cli.json(["simulate", "apparent-affinity", "--kd", "1 nM", "--koff", f"{koff} /s", "--incubation", "1 h"])
    b = krt_cli.json(["simulate", "apparent-affinity", "--kon", f"{koff / 1e-9} /M/s", "--residence-time", "6 h", "--incubation", "1 h"])
    c = krt_cli.json(["simulate", "apparent-affinity", "--kon", f"{koff / 1e-9} /M/s", "--kd", "1 nM", "--incubation", "60 min"])
    assert a["apparent_kd_M"] == pytest.approx(b["apparent_kd_M"], rel=1e-9) == pytest.approx(c["apparent_kd_M"], rel=1e-9)


def test_competition_format_reports_ic50_and_cheng_prusoff_ki(krt_cli):
    argv = ["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h",
            "--format", "competition-binding", "--tracer-kd", "2 nM", "--tracer-residence-time", "1 min", "--tracer-conc", "2 nM"]
    d = krt_cli.json(argv)
    assert d["apparent_ki_M"] == pytest.approx(d["ic50_M"] / 2.0, rel=1e-12)  # Cheng & Prusoff 1973, L = Kd
    assert d["fold_shift"] == pytest.approx(d["apparent_ki_M"] / 1e-9, rel=1e-12)
    assert "apparent_kd_M" not in d
    pre = krt_cli.json(argv + ["--preincubation", "30 min"])
    assert pre["preincubation_s"] == 1800 and pre["fold_shift"] < d["fold_shift"]


def test_readable_report_uses_units_and_ends_with_the_caution(krt_cli):
    rc, out, err = krt_cli.run(["simulate", "apparent-affinity", "--kd", "23 pM", "--residence-time", "48 h", "--incubation", "1 h"])
    assert rc == 0 and err == ""
    assert "apparent KD 775 pM" in out  # common practice: ~690 pM (computed 775 pM), see test_assay.py
    assert "rule of thumb 2 x RT: 4 d" in out
    assert out.strip().splitlines()[-1].startswith("Caution: simulations are decision support, not dosing advice")


def test_ki_shift_bounds_reports_an_interval_containing_the_simulated_residence_time(krt_cli):
    rt = 1 * H
    ki_s, _ = assay.apparent_affinity(1e-9, 1 / rt, 600)
    ki_l, _ = assay.apparent_affinity(1e-9, 1 / rt, 3 * H)
    d = krt_cli.json(["simulate", "ki-shift-bounds", "--ratio", str(float(ki_s / ki_l)), "--short-incubation", "10 min",
                          "--long-incubation", "3 h", "--ki", f"{float(ki_l)} M"])
    assert d["consistent"] and d["shift_detected"]
    assert d["rt_low_s"] < rt < d["rt_high_s"]


def test_ki_shift_without_shift_reports_an_upper_bound(krt_cli):
    d = krt_cli.json(["simulate", "ki-shift-bounds", "--ratio", "1.0", "--short-incubation", "30 min",
                          "--long-incubation", "4 h", "--ki", "5 nM", "--kon-range", "1e5 /M/s", "1e7 /M/s", "--ratio-tolerance", "1.3"])
    assert d["shift_detected"] is False
    assert d["rt_from_ratio_s"][0] == 0.0 and math.isfinite(d["rt_high_s"])
    assert d["rt_low_s"] == pytest.approx(1 / (1e7 * 5e-9), rel=1e-6)


def test_strongly_slow_binding_that_needs_a_kon_below_the_range_is_said_so_not_called_inconsistent(krt_cli):
    # RT 100 h, kon 1e4 /M/s (KD 0.28 nM): the shift between 1 h and 16 h and the 16 h Ki come from the library's
    # saturation read (checked against solve_ivp in test_assay.py); no kon in 1e5-1e8 fits, because kon is lower
    rt, kon = 100 * H, 1e4
    kd = 1 / (rt * kon)
    ki_s, _ = assay.apparent_affinity(kd, 1 / rt, 1 * H)
    ki_l, _ = assay.apparent_affinity(kd, 1 / rt, 16 * H)
    argv = ["simulate", "ki-shift-bounds", "--ratio", str(float(ki_s / ki_l)), "--short-incubation", "1 h",
            "--long-incubation", "16 h", "--ki", f"{float(ki_l)} M"]
    d = krt_cli.json(argv)
    assert d["consistent"] is False and d["verdict"] == "kon-below-range"
    assert d["rt_from_ratio_s"][0] > 16 * H  # the shift alone says the residence time exceeds the long read
    rc, text, _ = krt_cli.run(argv)
    assert rc == 0 and "Strongly slow binding" in text and "needs a kon below" in text and "inconsistent" not in text


BAD = [
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--incubation", "1 h"], "any two"),
    (["simulate", "apparent-affinity", "--koff", "1e-3 /s", "--residence-time", "1000 s", "--incubation", "1 h"], "any two"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--kon", "1e6 /M/s", "--koff", "1 /s", "--incubation", "1 h"], "inconsistent"),
    (["simulate", "apparent-affinity", "--kd", "-1 nM", "--residence-time", "6 h", "--incubation", "1 h"], "positive"),
    (["simulate", "apparent-affinity", "--kd", "0 nM", "--residence-time", "6 h", "--incubation", "1 h"], "positive"),
    (["simulate", "apparent-affinity", "--kd", "1 furlong", "--residence-time", "6 h", "--incubation", "1 h"], "unknown unit"),
    (["simulate", "apparent-affinity", "--kd", "1 h", "--residence-time", "6 h", "--incubation", "1 h"], "concentration"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h"], "--incubation"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h", "--format", "fret"], "--format"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h", "--format", "competition-binding"], "tracer"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h", "--format", "competition-binding",
      "--tracer-kd", "1 nM", "--tracer-residence-time", "1 min"], "--tracer-conc"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h", "--tolerance", "0.9"], "--tolerance"),
    (["simulate", "apparent-affinity", "--kd", "1 nM", "--residence-time", "6 h", "--incubation", "1 h", "--preincubation", "5 min"], "--preincubation"),
    (["simulate", "ki-shift-bounds", "--ratio", "-2", "--short-incubation", "10 min", "--long-incubation", "3 h", "--ki", "1 nM"], "--ratio"),
    (["simulate", "ki-shift-bounds", "--ratio", "2", "--short-incubation", "3 h", "--long-incubation", "10 min", "--ki", "1 nM"], "longer"),
    (["simulate", "ki-shift-bounds", "--ratio", "2", "--short-incubation", "10 min", "--long-incubation", "3 h"], "--ki"),
    (["simulate", "ki-shift-bounds", "--ratio", "2", "--short-incubation", "10 min", "--long-incubation", "3 h", "--ki", "1 nM",
      "--kon-range", "1e8 /M/s", "1e5 /M/s"], "--kon-range"),
    (["simulate", "ki-shift-bounds", "--ratio", "2", "--short-incubation", "10 min", "--long-incubation", "3 h", "--ki", "1 nM",
      "--kon-range", "1e5 /s", "1e8 /M/s"], "--kon-range"),
    (["simulate"], "choose a simulation"),
]


@pytest.mark.parametrize("argv,fragment", BAD, ids=[f"bad{i}" for i in range(len(BAD))])
def test_bad_input_gives_one_clear_line_and_a_nonzero_exit(krt_cli, argv, fragment):
    krt_cli.fails(argv, fragment)
