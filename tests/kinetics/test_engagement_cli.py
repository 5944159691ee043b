"""``krt simulate engagement`` end to end: JSON contract, readable report, one-line errors.

Numbers are compared with :func:`tracker.kinetics.engagement.engagement_metrics`, which
test_engagement.py checks against scipy solve_ivp (computed) and facts of the trade.
"""

from __future__ import annotations

import pytest

from tracker.kinetics.engagement import engagement_metrics

H = 3600.0
KEYS = {"onset_s", "offset_s", "duration_above_threshold_s", "peak_occupancy", "trough_occupancy", "pd_half_life_s"}


ORAL = ["simulate", "engagement", "--kd", "1 nM", "--residence-time", "6 h", "--route", "oral", "--free-cmax", "2 nM",
        "--tmax", "30 min", "--half-life", "2 h", "--threshold", "0.3"]


def test_engagement_json_has_the_documented_keys_and_library_values(krt_cli):
    d = krt_cli.json(ORAL)
    assert KEYS <= set(d)
    koff = 1 / (6 * H)
    m = engagement_metrics(koff / 1e-9, koff, "oral", 2e-9, 1800, 7200, 0.3)
    assert d["onset_s"] == pytest.approx(float(m.onset_s), rel=1e-12)
    assert d["offset_s"] == pytest.approx(float(m.offset_s), rel=1e-12)
    assert d["peak_occupancy"] == pytest.approx(float(m.peak_occupancy), rel=1e-12)
    assert d["trough_occupancy"] is None  # single dose: no steady state
    assert d["rapid_equilibrium"]["peak_occupancy"] == pytest.approx(2 / 3, rel=1e-12)


def test_threshold_accepts_percent_and_iv_uses_cmax_at_time_zero(krt_cli):
    argv = ["simulate", "engagement", "--kd", "1 nM", "--koff", "0.01 /s", "--route", "iv", "--free-cmax", "4 nM",
            "--half-life", "1 h", "--threshold", "50 %"]
    d = krt_cli.json(argv)
    assert d["inputs"]["threshold"] == 0.5
    assert d["rapid_equilibrium"]["onset_s"] == 0.0  # 4 nM at t = 0 is above KD (50 % at 1 nM)
    assert d["rapid_equilibrium"]["peak_occupancy"] == pytest.approx(0.8, rel=1e-12)


def test_repeat_dosing_reports_a_steady_state_trough(krt_cli):
    d = krt_cli.json(ORAL + ["--dosing-interval", "12 h", "--doses", "3"])
    assert 0 < d["trough_occupancy"] < d["peak_occupancy"]
    assert d["inputs"]["doses"] == 3


def test_an_unreachable_threshold_reports_nulls_not_numbers(krt_cli):
    argv = ["simulate", "engagement", "--kd", "10 nM", "--kon", "1e6 /M/s", "--route", "oral", "--free-cmax", "1 nM",
            "--tmax", "1 h", "--half-life", "2 h", "--threshold", "0.5"]
    d = krt_cli.json(argv)
    assert d["onset_s"] is None and d["offset_s"] is None and d["pd_half_life_s"] is None
    assert d["duration_above_threshold_s"] == 0.0


def test_readable_report_names_onset_offset_and_the_caution(krt_cli):
    rc, out, err = krt_cli.run(ORAL)
    assert rc == 0 and err == ""
    assert "onset" in out and "offset" in out and "koff < ke" in out
    assert "not dosing advice" in out.strip().splitlines()[-1]


BAD = [
    (ORAL[:10] + ["--half-life", "2 h"], "--tmax"),  # oral without tmax
    ([a if a != "0.3" else "1.5" for a in ORAL], "--threshold"),
    ([a if a != "0.3" else "0" for a in ORAL], "--threshold"),
    ([a if a != "oral" else "im" for a in ORAL], "--route"),
    ([a for a in ORAL if a not in ("--free-cmax", "2 nM")], "--free-cmax"),
    ([a if a != "2 h" else "2 nM" for a in ORAL], "--half-life"),
    ([a if a != "2 h" else "-2 h" for a in ORAL], "positive"),
    (ORAL + ["--doses", "0", "--dosing-interval", "12 h"], "--doses"),
    (ORAL + ["--doses", "3"], "--dosing-interval"),
    (ORAL + ["--doses", "two", "--dosing-interval", "12 h"], "--doses"),
    (["simulate", "engagement", "--kd", "1 nM", "--route", "iv", "--free-cmax", "1 nM", "--half-life", "1 h"], "any two"),
    (["simulate", "engagement", "--kd", "1 nM", "--koff", "1e-3 /s", "--route", "iv", "--free-cmax", "1 nM",
      "--half-life", "1 h", "--tmax", "1 h"], "--tmax"),
    (["simulate", "engagement", "--kd", "1 nM", "--kon", "1e12 /M/s", "--route", "iv", "--free-cmax", "1 nM",
      "--half-life", "1 h"], "diffusion limit"),
]


@pytest.mark.parametrize("argv,fragment", BAD, ids=[f"bad{i}" for i in range(len(BAD))])
def test_bad_engagement_input_gives_one_clear_line_and_a_nonzero_exit(krt_cli, argv, fragment):
    krt_cli.fails(argv, fragment)
