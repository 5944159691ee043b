"""``krt fit`` options of issue 11: --weights, --receptor-conc, tracer intervals, morrison --enzyme-conc.

The data come from references outside the package:
* dissociation B(t) = B0·exp(-koff·t) + NSB (Copeland, Pompliano & Meek 2006, Nat Rev Drug Discov 5:730)
  with proportional (constant-CV) noise;
* association with ligand depletion, dB/dt = kon·(L0 - B)·(R0 - B) - koff·B
  (computed: scipy solve_ivp LSODA rtol 1e-10, atol 1e-22);
* competition kinetics (Motulsky & Mahan 1984, Mol Pharmacol 25:1) through tracker.kinetics.equations,
  itself checked against solve_ivp in tests/kinetics/test_equations.py;
* tight-binding inhibition v/v0 = 1 - [(E + I + Ki) - sqrt((E + I + Ki)^2 - 4·E·I)]/(2·E)
  (Morrison 1969, Biochim Biophys Acta 185:269), written out here.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from tracker.kinetics import equations as eq


def write(path, header, rows):
    path.write_text(header + "\n" + "".join(",".join(str(v) for v in r) + "\n" for r in rows))
    return str(path)


@pytest.fixture
def proportional_decay(tmp_path):
    rng = np.random.default_rng(3)
    t = np.linspace(0, 60, 31)  # min
    y = (1000 * np.exp(-1e-3 * t * 60) + 50) * (1 + rng.normal(0, 0.08, t.size))  # Copeland et al. 2006, 8% CV
    return write(tmp_path / "prop.csv", "time (min),signal", [(a, f"{b:.3f}") for a, b in zip(t, y)])


def test_weights_default_to_none_and_are_reported(krt_cli, proportional_decay):
    d = krt_cli.json(["fit", "dissociation", proportional_decay])
    assert d["weights"] == "none"


def test_proportional_weights_reach_the_fit_and_the_json(krt_cli, proportional_decay):
    plain = krt_cli.json(["fit", "dissociation", proportional_decay])
    weighted = krt_cli.json(["fit", "dissociation", proportional_decay, "--weights", "proportional"])
    assert weighted["weights"] == "proportional"
    assert weighted["koff_per_s"] == pytest.approx(1e-3, rel=0.1)  # truth of the simulation
    lo, hi = weighted["koff_ci95_per_s"]
    assert lo < 1e-3 < hi
    # constant-CV noise: the weighted interval is the narrower one (issue 11: unweighted intervals were ~3x wider)
    assert (hi - lo) < (plain["koff_ci95_per_s"][1] - plain["koff_ci95_per_s"][0])


def test_weights_apply_to_every_method(krt_cli, tmp_path):
    rows = [(x, f"{eq.logistic4(x * 1e-9, 0, 100, 30e-9, 1.0):.3f}", "30 min") for x in np.geomspace(0.1, 1e4, 11)]
    rows += [(x, f"{eq.logistic4(x * 1e-9, 0, 100, 10e-9, 1.0):.3f}", "4 h") for x in np.geomspace(0.1, 1e4, 11)]
    d = krt_cli.json(["fit", "ki-shift", write(tmp_path / "ks.csv", "concentration (nM),signal,curve", rows),
                      "--weights", "poisson"])
    assert d["weights"] == "poisson"


def depletion_csv(tmp_path, kon=1e6, koff=1e-3, r0=2e-9):
    rng = np.random.default_rng(5)
    t = np.linspace(0, 1800, 25)
    rows = []
    for c in (1, 2, 5, 10):  # nM, comparable to the 2 nM of receptor: depletion
        l0 = c * 1e-9
        sol = solve_ivp(lambda _t, y: [kon * (l0 - y[0]) * (r0 - y[0]) - koff * y[0]], (0, 1800), [0.0], t_eval=t,
                        method="LSODA", rtol=1e-10, atol=1e-22)  # computed: scipy solve_ivp LSODA rtol 1e-10
        rows += [(a, f"{b / r0 * 1000 + rng.normal(0, 5):.3f}", c) for a, b in zip(t, sol.y[0])]
    return write(tmp_path / "dep.csv", "time (s),signal,concentration (nM)", rows)


def test_receptor_conc_switches_association_to_the_depletion_aware_model(krt_cli, tmp_path):
    path = depletion_csv(tmp_path)
    naive = krt_cli.json(["fit", "association", path])
    aware = krt_cli.json(["fit", "association", path, "--receptor-conc", "2 nM"])
    assert aware["depletion"]["receptor_conc_M"] == pytest.approx(2e-9)
    assert aware["koff_per_s"] == pytest.approx(1e-3, rel=0.1) and aware["kon_per_M_per_s"] == pytest.approx(1e6, rel=0.1)
    lo, hi = aware["koff_ci95_per_s"]
    assert lo < 1e-3 < hi
    # without the receptor concentration the same data are flagged
    assert "depletion-suspected" in {w["code"] for w in naive["warnings"]}


def competition_csv(tmp_path):
    rng = np.random.default_rng(4)
    rows = []
    for c in (0, 3, 10, 30):
        for t in np.linspace(0, 240, 41):
            b = eq.motulsky_mahan(t * 60, 1e-9, 1e8 / 60, 0.1 / 60, c * 1e-9, 1e7 / 60, 0.01 / 60, 1000)
            rows.append((t, f"{b + rng.normal(0, 5):.3f}", c))
    return write(tmp_path / "mm.csv", "time (min),signal,concentration (nM)", rows)


TRACER = ["--tracer-kon", "1e8 /M/min", "--tracer-koff", "0.1 /min", "--tracer-conc", "1 nM"]


def test_tracer_intervals_widen_the_competitor_intervals(krt_cli, tmp_path):
    path = competition_csv(tmp_path)
    exact = krt_cli.json(["fit", "competition-kinetics", path, *TRACER])
    uncertain = krt_cli.json(["fit", "competition-kinetics", path, *TRACER,
                              "--tracer-kon-ci", "0.6e8,1.6e8 /M/min", "--tracer-koff-ci", "0.07 /min, 0.14 /min"])
    width = lambda d: np.log(d["koff_ci95_per_s"][1] / d["koff_ci95_per_s"][0])  # noqa: E731
    assert width(uncertain) > 1.2 * width(exact)
    assert uncertain["koff_ci95_per_s"][0] < 0.01 / 60 < uncertain["koff_ci95_per_s"][1]


def test_morrison_takes_the_enzyme_concentration(krt_cli, tmp_path):
    rng = np.random.default_rng(6)
    e, ki = 5e-9, 1e-9
    i = np.geomspace(0.1e-9, 1e-6, 13)
    v = 1 - ((e + i + ki) - np.sqrt((e + i + ki) ** 2 - 4 * e * i)) / (2 * e)  # Morrison 1969
    path = write(tmp_path / "mor.csv", "concentration (nM),signal", [(f"{a * 1e9:.5g}", f"{100 * b + rng.normal(0, 1.5):.3f}")
                                                                     for a, b in zip(i, v)])
    d = krt_cli.json(["fit", "morrison", path, "--enzyme-conc", "5 nM"])
    assert d["estimates"]["kapp"] == pytest.approx(1e-9, rel=0.3)
    assert d["estimates"]["ic50"] == pytest.approx(d["estimates"]["kapp"] + e / 2, rel=1e-6)  # Copeland et al. 1995


@pytest.mark.parametrize("argv,fragment", [
    (["dissociation", "{prop}", "--receptor-conc", "2 nM"], "--receptor-conc does not apply to dissociation"),
    (["dissociation", "{prop}", "--weights", "cubic"], "invalid choice: 'cubic'"),
    (["competition-kinetics", "{mm}", *TRACER, "--tracer-kon-ci", "1e8 /M/min"], "--tracer-kon-ci: give the interval as LO,HI"),
    (["competition-kinetics", "{mm}", *TRACER, "--tracer-koff-ci", "0.2,0.1 /min"], "--tracer-koff-ci: the interval's low end"),
    (["competition-kinetics", "{mm}", *TRACER, "--tracer-koff-ci", "0.1,0.2 nM"], "--tracer-koff-ci: unit 'nM' is a concentration"),
    (["morrison", "{prop}"], "morrison needs --enzyme-conc"),
    (["association", "{prop}", "--receptor-conc", "2"], "--receptor-conc: missing unit"),
])
def test_option_mistakes_get_one_line(krt_cli, tmp_path, proportional_decay, argv, fragment):
    mm = competition_csv(tmp_path)
    krt_cli.fails(["fit", *[a.format(prop=proportional_decay, mm=mm) for a in argv]], fragment)


def test_a_rising_trace_is_refused_by_dissociation_naming_the_file(krt_cli, tmp_path):
    rng = np.random.default_rng(7)
    t = np.linspace(0, 60, 31)
    y = 1000 * (1 - np.exp(-1e-3 * t * 60)) + rng.normal(0, 10, t.size)
    path = write(tmp_path / "rise.csv", "time (min),signal", [(a, f"{b:.3f}") for a, b in zip(t, y)])
    krt_cli.fails(["fit", "dissociation", path], "rise.csv: dissociation: the signal rises")
