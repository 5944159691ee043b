"""``krt fit`` end to end: CSV in, JSON/report out, and one clear line for bad input.

Data are simulated from the published closed forms (sources in
tests/kinetics/test_equations.py) with seeded noise, written as CSV files in
the documented layout, and run through ``tracker.cli.main``.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tracker.cli import main
from tracker.kinetics import equations as eq

CONTRACT = {
    "koff_per_s", "koff_ci95_per_s", "kon_per_M_per_s", "kon_ci95_per_M_per_s", "kd_M", "residence_time_s",
    "half_life_s", "warnings", "n_points", "r_squared", "method", "ci_kind", "schema_version",
}


def write(path, header, rows):
    path.write_text(header + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n")
    return str(path)


def run_json(capsys, argv):
    rc = main(argv + ["--json"])
    out, err = capsys.readouterr()
    assert rc == 0, err
    assert err == ""
    return json.loads(out)


# ------------------------------------------------------------ happy paths, one per method
def dissociation_csv(tmp_path):
    rng = np.random.default_rng(1)
    t = np.linspace(0, 60, 31)  # minutes
    y = eq.one_phase_decay(t * 60, 1e-3, 1000.0, 50.0) + rng.normal(0, 10, t.size)
    return write(tmp_path / "diss.csv", "time (min),signal,well", [(a, f"{b:.3f}", "B7") for a, b in zip(t, y)])


def test_dissociation_json_follows_the_documented_contract(tmp_path, capsys):
    d = run_json(capsys, ["fit", "dissociation", dissociation_csv(tmp_path)])
    assert CONTRACT <= set(d)
    assert d["method"] == "dissociation" and d["n_points"] == 31
    assert d["koff_per_s"] == pytest.approx(1e-3, rel=0.1)  # truth of the simulation
    lo, hi = d["koff_ci95_per_s"]
    assert lo < d["koff_per_s"] < hi
    assert d["residence_time_s"] == pytest.approx(1 / d["koff_per_s"])  # RT = 1/koff (Copeland et al. 2006)
    assert d["half_life_s"] == pytest.approx(np.log(2) / d["koff_per_s"])
    assert d["kon_per_M_per_s"] is None and isinstance(d["warnings"], list)


def test_the_readable_report_names_the_results_and_their_intervals(tmp_path, capsys):
    assert main(["fit", "dissociation", dissociation_csv(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "residence time" in out and "95% CI" in out and "R²" in out and "not dosing" in out


def test_association_at_several_concentrations_in_nanomolar_gives_kon_and_koff(tmp_path, capsys):
    rng = np.random.default_rng(2)
    rows = []
    for c in (1, 3, 10, 30):
        for t in np.linspace(0, 1800, 25):
            rows.append((t, f"{eq.association(t, c * 1e-9, 1e6, 1e-3, 1000) + rng.normal(0, 10):.3f}", c, f"L{c}"))
    path = write(tmp_path / "assoc.csv", "time,signal,concentration,curve", rows)
    d = run_json(capsys, ["fit", "association", path, "--conc-unit", "nM", "--time-unit", "s"])
    assert d["kon_per_M_per_s"] == pytest.approx(1e6, rel=0.1)
    assert d["koff_per_s"] == pytest.approx(1e-3, rel=0.1)
    assert d["kd_M"] == pytest.approx(1e-9, rel=0.1)
    assert d["kobs_line"]["slope"] == pytest.approx(1e6, rel=0.2)


def test_one_association_curve_with_a_known_koff_gives_kon_from_the_command_line(tmp_path, capsys):
    rng = np.random.default_rng(3)
    t_min = np.linspace(0, 30, 31)
    rows = [(t, f"{eq.association(t * 60, 1e-8, 1e6, 1e-3, 1000) + rng.normal(0, 5):.3f}", 10) for t in t_min]
    path = write(tmp_path / "one.csv", "time,signal,concentration", rows)
    d = run_json(capsys, ["fit", "association", path, "--time-unit", "min", "--conc-unit", "nM", "--koff", "0.06 /min"])
    assert d["kon_per_M_per_s"] == pytest.approx(1e6, rel=0.1)
    assert d["koff_per_s"] == pytest.approx(1e-3)


def test_competition_kinetics_takes_the_tracer_constants_with_units(tmp_path, capsys):
    rng = np.random.default_rng(4)
    k1, k2 = 1e8 / 60, 0.1 / 60  # docs/REFERENCES.md test vector (Motulsky & Mahan 1984)
    rows = []
    for c in (0, 3, 10, 30, 100):
        for t in np.linspace(0, 240, 49):
            b = eq.motulsky_mahan(t * 60, 1e-9, k1, k2, c * 1e-9, 1e7 / 60, 0.01 / 60, 1000)
            rows.append((t, f"{b + rng.normal(0, 5):.3f}", c, f"I{c}"))
    path = write(tmp_path / "mm.csv", "time,signal,concentration,curve", rows)
    d = run_json(capsys, ["fit", "competition-kinetics", path, "--time-unit", "min", "--conc-unit", "nM",
                          "--tracer-kon", "1e8 /M/min", "--tracer-koff", "0.1 /min", "--tracer-conc", "1 nM"])
    assert d["kon_per_M_per_s"] == pytest.approx(1e7 / 60, rel=0.1)
    assert d["koff_per_s"] == pytest.approx(0.01 / 60, rel=0.1)


def test_jump_dilution_uses_the_control_curve_and_warns_that_kobs_is_not_koff(tmp_path, capsys):
    rng = np.random.default_rng(5)
    t = np.linspace(0, 3600, 40)
    rows = [(a, f"{5 + 2 * a + rng.normal(0, 15):.2f}", "control") for a in t]
    rows += [(a, f"{eq.jump_dilution_progress(a, 0.1, 2.0, 1e-3, 3) + rng.normal(0, 15):.2f}", "cpd-7") for a in t]
    d = run_json(capsys, ["fit", "jump-dilution", write(tmp_path / "jd.csv", "time (s),signal,curve", rows)])
    assert d["koff_per_s"] == pytest.approx(1e-3, rel=0.25)
    assert "kobs-not-koff" in {w["code"] for w in d["warnings"]}


def test_washout_recovery_reports_koff(tmp_path, capsys):
    rng = np.random.default_rng(6)
    t = np.linspace(0, 120, 41)
    rows = [(a, f"{100 + rng.normal(0, 2):.2f}", "control") for a in t]
    rows += [(a, f"{eq.washout_recovery(a * 60, 100, 0.9, 5e-4) + rng.normal(0, 2):.2f}", "cpd") for a in t]
    d = run_json(capsys, ["fit", "washout-recovery", write(tmp_path / "wo.csv", "time,signal,curve", rows),
                          "--time-unit", "min"])
    assert d["koff_per_s"] == pytest.approx(5e-4, rel=0.1)


def test_ki_shift_reads_incubation_times_from_curve_labels(tmp_path, capsys):
    rng = np.random.default_rng(7)
    rows = []
    for label, ic50 in (("30 min", 30e-9), ("4 h", 10e-9)):
        for x in np.geomspace(0.01, 10000, 13):  # nM
            rows.append((x, f"{eq.logistic4(x * 1e-9, 0, 100, ic50, 1.0) + rng.normal(0, 1.5):.2f}", label))
    path = write(tmp_path / "ks.csv", "concentration,signal,curve", rows)
    d = run_json(capsys, ["fit", "ki-shift", path, "--conc-unit", "nM", "--tracer-conc", "2 nM", "--tracer-kd", "1 nM"])
    assert d["ki_shift_ratio"] == pytest.approx(3.0, rel=0.15)
    assert d["incubation_short_s"] == 1800 and d["incubation_long_s"] == 14400
    assert d["ki_M"] == pytest.approx(10e-9 / 3, rel=0.15)  # Ki = IC50/(1 + L/Kd) (Cheng & Prusoff 1973)


def test_insurmountability_reports_the_fraction_of_maximal_response(tmp_path, capsys):
    rng = np.random.default_rng(8)
    rows = []
    for label, emax in (("control", 100), ("antagonist 30 nM", 50)):
        for x in np.geomspace(1e-10, 1e-4, 13):
            rows.append((x, f"{eq.agonist_response(x, 0, emax, 1e-8, 1) + rng.normal(0, 2):.2f}", label))
    path = write(tmp_path / "ins.csv", "concentration (M),signal,curve", rows)
    d = run_json(capsys, ["fit", "insurmountability", path])
    assert d["max_response_fraction"] == pytest.approx(0.5, rel=0.1)
    lo, hi = d["max_response_fraction_ci95"]
    assert lo < 0.5 < hi


# ------------------------------------------------------------ bad input: one line, non-zero exit
def _constant(tmp):
    return write(tmp / "data.csv", "time (s),signal", [(t, 5) for t in range(20)])


BAD = [
    ("missing file", None, ["fit", "dissociation", "{tmp}/absent.csv"], "absent.csv: file not found"),
    ("semicolon file", "time (s);signal\n0;1\n", ["fit", "dissociation", "{f}"],
     "data.csv:1: the file uses ';' between fields; save it comma-separated"),
    ("tab file", "time (s)\tsignal\n0\t1\n", ["fit", "dissociation", "{f}"],
     "data.csv:1: the file uses tabs between fields; save it comma-separated"),
    ("unitless time header", "time,signal\n0,1\n60,2\n", ["fit", "dissociation", "{f}"],
     "data.csv:1: time: a unit is needed: write it in the header, e.g. 'time (min)', or give the time unit (--time-unit)"),
    ("unitless concentration header", "time (min),signal,concentration\n0,1,1\n", ["fit", "association", "{f}"],
     "data.csv:1: concentration: a unit is needed"),
    ("header unit contradicts the option", "time (min),signal\n0,1\n", ["fit", "dissociation", "{f}", "--time-unit", "s"],
     "data.csv:1: time: the header says 'min' but the time unit given is 's'"),
    ("empty file", "", ["fit", "dissociation", "{f}"], "file is empty"),
    ("no data rows", "time,signal\n", ["fit", "dissociation", "{f}"], "data.csv:2: no data rows"),
    ("missing column", "time,value\n0,1\n", ["fit", "dissociation", "{f}"], "data.csv:1: signal: missing column 'signal'"),
    ("non-numeric cell", "time (s),signal\n0,1\n60,abc\n", ["fit", "dissociation", "{f}"], "data.csv:3: signal: not a number: 'abc'"),
    ("empty cell", "time (s),signal\n0,\n", ["fit", "dissociation", "{f}"], "data.csv:2: signal: empty cell"),
    ("not finite", "time (s),signal\n0,1\nnan,2\n", ["fit", "dissociation", "{f}"], "data.csv:3: time: not a finite number"),
    ("negative time", "time (s),signal\n0,1\n-5,2\n", ["fit", "dissociation", "{f}"], "data.csv:3: time: negative time"),
    ("header unit of the wrong kind", "time (nM),signal\n0,1\n", ["fit", "dissociation", "{f}"],
     "data.csv:1: time: unit 'nM' is a concentration"),
    ("too few points", "time (s),signal\n0,10\n60,8\n120,6\n180,5\n", ["fit", "dissociation", "{f}"], "too few points"),
    ("constant signal", _constant, ["fit", "dissociation", "{f}"], "data.csv: the signal is constant"),
    ("unknown method", "time,signal\n0,1\n", ["fit", "decay", "{f}"], "invalid choice: 'decay'"),
    ("option unit of the wrong kind", "time (s),signal,concentration (nM)\n0,1,1\n", ["fit", "association", "{f}", "--koff", "1 nM"],
     "--koff: unit 'nM' is a concentration, expected a first-order rate"),
    ("option without unit", "time (s),signal,concentration (nM)\n0,1,1\n", ["fit", "association", "{f}", "--koff", "0.001"],
     "--koff: missing unit"),
    ("option for another method", "time,signal\n0,1\n", ["fit", "dissociation", "{f}", "--koff", "1e-3 /s"],
     "--koff does not apply to dissociation"),
    ("tracer constants missing", "time (s),signal,concentration (nM)\n0,1,1\n", ["fit", "competition-kinetics", "{f}"],
     "needs --tracer-kon, --tracer-koff, --tracer-conc"),
    ("curve with two concentrations", "time (s),signal,concentration (nM),curve\n0,1,1,a\n60,2,1,a\n120,3,2,a\n",
     ["fit", "association", "{f}"], "data.csv:4: concentration: curve 'a' has a second concentration"),
    ("incubation label that is not a time", "concentration (nM),signal,curve\n1,2,early\n", ["fit", "ki-shift", "{f}"],
     "data.csv:2: curve: curve label 'early' is not an incubation time"),
    ("no control curve", "concentration (M),signal,curve\n" + "".join(f"{10.0**-k},{k},a\n" for k in range(4, 11)),
     ["fit", "insurmountability", "{f}"], "exactly one curve labelled 'control'"),
]


@pytest.mark.parametrize("content,argv,expected", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_bad_input_gets_one_clear_line_and_a_non_zero_exit(tmp_path, capsys, content, argv, expected):
    f = tmp_path / "data.csv"
    if callable(content):
        content(tmp_path)
    elif content is not None:
        f.write_text(content)
    argv = [a.format(tmp=tmp_path, f=f) for a in argv]
    with pytest.raises(SystemExit) if "invalid choice" in expected else _no_exit():
        rc = main(argv)
        assert rc != 0
    out, err = capsys.readouterr()
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("krt: error: ")
    assert expected in lines[0]


class _no_exit:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False
