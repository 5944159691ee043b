"""Weighting (none / proportional / poisson) and replicate curves fitted jointly.

Data come from the closed forms (one-phase dissociation: Copeland, Pompliano & Meek 2006, Nat Rev Drug Discov
5:730; pseudo-first-order association: common practice) with seeded noise whose standard deviation is
proportional to the signal (relative error).  Weighted least squares with sigma_i proportional to the signal is
the maximum-likelihood fit for that noise (common practice); the coverage checks count how often the 95%
interval holds the true koff over seeded replicates: with 200 replicates the binomial standard error is ~1.5%,
so 0.90-0.99 is a > 3-sigma acceptance band (common practice for simulation-based coverage checks).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tracker.errors import FitError
from tracker.kinetics import equations as eq
from tracker.kinetics import fit_association, fit_dissociation, fit_table

KOFF = 1e-3
T = np.linspace(0, 3600, 40)


def proportional(y, rel, rng):
    return y * (1.0 + rng.normal(0, rel, y.shape))


def test_the_weighting_is_reported_in_the_result_and_its_json():
    rng = np.random.default_rng(1)
    y = proportional(eq.dissociation(T, KOFF, 1000.0, 50.0), 0.05, rng)
    r = fit_dissociation(T, y, weights="proportional")
    assert r.weights == "proportional"
    assert r.to_dict()["weights"] == "proportional" and r.to_json_keys()["weights"] == "proportional"
    assert json.loads(json.dumps(r.to_json_keys(), allow_nan=False))["koff_per_s"] == pytest.approx(KOFF, rel=0.1)
    assert fit_dissociation(T, y).to_json_keys()["weights"] == "none"


def test_an_unknown_weighting_is_refused_with_the_choices():
    with pytest.raises(FitError, match="none, proportional, poisson"):
        fit_dissociation(T, eq.dissociation(T, KOFF, 1000.0, 50.0), weights="relative")


@pytest.mark.parametrize("weights", ["none", "proportional", "poisson"])
def test_every_weighting_recovers_koff_from_noise_free_data(weights):
    # the weights change the noise model, not the curve: exact data give the exact koff whatever the weights
    r = fit_dissociation(T, eq.dissociation(T, KOFF, 1000.0, 50.0), weights=weights, check_biphasic=False)
    assert r.estimates["koff"] == pytest.approx(KOFF, rel=1e-6)


@pytest.mark.parametrize("method", ["dissociation", "association", "jump-dilution", "washout-recovery"])
def test_fit_table_accepts_weights_for_time_course_methods(method):
    rng = np.random.default_rng(4)
    t = np.linspace(0, 7200, 40)
    if method == "dissociation":
        df = pd.DataFrame({"time": t, "signal": proportional(eq.dissociation(t, KOFF, 1000.0, 50.0), 0.03, rng)})
    elif method == "association":
        L = np.repeat([1e-9, 3e-9, 1e-8], 40)
        tt = np.tile(t, 3)
        df = pd.DataFrame({"time": tt, "concentration": L,
                           "signal": proportional(eq.association(tt, L, 1e6, KOFF, 1000.0) + 20, 0.03, rng)})
    elif method == "jump-dilution":
        inh = eq.jump_dilution_progress(t, 0.1, 2.0, KOFF, 3.0)
        df = pd.DataFrame({"time": np.r_[t, t], "signal": proportional(np.r_[3 + 2.0 * t, inh] + 1, 0.02, rng),
                           "curve": np.repeat(["control", "cpd"], 40)})
    else:
        df = pd.DataFrame({"time": t, "signal": proportional(eq.washout_recovery(t, 100.0, 0.9, 5e-4), 0.02, rng)})
    r = fit_table(method, df, weights="proportional")
    assert r.weights == "proportional"
    assert r.estimates["koff"] == pytest.approx(5e-4 if method == "washout-recovery" else KOFF, rel=0.3)


def test_replicate_curves_in_a_replicate_column_are_fitted_jointly_with_their_own_amplitudes():
    rng = np.random.default_rng(7)
    spans = {"r1": 1000.0, "r2": 700.0, "r3": 1300.0}
    rows = []
    for rep, span in spans.items():
        y = eq.dissociation(T, KOFF, span, 30.0) + rng.normal(0, 10, T.size)
        rows += [(a, b, rep) for a, b in zip(T, y)]
    df = pd.DataFrame(rows, columns=["time", "signal", "replicate"])
    joint = fit_table("dissociation", df)
    assert set(joint.curve_labels) == set(spans)
    for rep, span in spans.items():
        assert joint.estimates[f"span[{rep}]"] == pytest.approx(span, rel=0.05)
    # one shared koff from all three curves: tighter than from any one replicate alone
    alone = fit_dissociation(T, df.signal[df.replicate == "r1"].to_numpy())
    width = lambda r: np.log(r.ci95["koff"][1] / r.ci95["koff"][0])  # noqa: E731
    assert width(joint) < width(alone)
    assert joint.ci95["koff"][0] <= KOFF <= joint.ci95["koff"][1]


def test_replicate_association_curves_at_one_concentration_share_kobs():
    rng = np.random.default_rng(8)
    L = 5e-9
    kobs = 1e6 * L + KOFF  # kobs = kon*L + koff (pseudo-first-order; common practice)
    t = np.tile(T, 2)
    y = np.r_[eq.one_phase_association(T, kobs, 800.0, 10.0), eq.one_phase_association(T, kobs, 600.0, 40.0)]
    r = fit_association(t, y + rng.normal(0, 8, t.size), np.full(t.size, L), np.repeat(["a", "b"], T.size), koff=KOFF)
    assert r.estimates["kobs"] == pytest.approx(kobs, rel=0.05)
    assert r.estimates["amplitude[a]"] == pytest.approx(800, rel=0.05)
    assert r.estimates["kon"] == pytest.approx(1e6, rel=0.1)


def _coverage_and_widths(n, seed, rel=0.08):
    rng = np.random.default_rng(seed)
    truth = eq.dissociation(T, KOFF, 1000.0, 10.0)
    hits_w, hits_u, ratio = 0, 0, []
    for _ in range(n):
        y = proportional(truth, rel, rng)
        w = fit_dissociation(T, y, weights="proportional", check_biphasic=False)
        u = fit_dissociation(T, y, check_biphasic=False)
        hits_w += w.ci95["koff"][0] <= KOFF <= w.ci95["koff"][1]
        hits_u += u.ci95["koff"][0] <= KOFF <= u.ci95["koff"][1]
        ratio.append(np.log(u.ci95["koff"][1] / u.ci95["koff"][0]) / np.log(w.ci95["koff"][1] / w.ci95["koff"][0]))
    return hits_w / n, hits_u / n, float(np.median(ratio))


@pytest.mark.slow
def test_weighted_intervals_are_calibrated_and_narrower_than_unweighted_on_proportional_noise(capsys):
    cov_w, cov_u, ratio = _coverage_and_widths(200, seed=303)
    with capsys.disabled():
        print(f"\n[coverage] dissociation koff, 200 replicates, 8% proportional noise: weighted {cov_w:.3f}, "
              f"unweighted {cov_u:.3f}; median width unweighted/weighted {ratio:.2f}")
    assert 0.90 <= cov_w <= 0.99
    assert ratio > 1.3  # the weighted interval is clearly narrower (the try-out saw ~3x on its data)


@pytest.mark.slow
def test_weighted_association_intervals_cover_kon_and_koff(capsys):
    # global association over three concentrations, 5% proportional noise
    rng = np.random.default_rng(404)
    L = np.repeat([1e-9, 3e-9, 1e-8], 30)
    t = np.tile(np.linspace(0, 3600, 30), 3)
    truth = eq.association(t, L, 1e6, KOFF, 1000.0) + 5.0
    hits = {"kon": 0, "koff": 0}
    n = 100
    for _ in range(n):
        r = fit_association(t, proportional(truth, 0.05, rng), L, weights="proportional", two_state=False)
        hits["kon"] += r.ci95["kon"][0] <= 1e6 <= r.ci95["kon"][1]
        hits["koff"] += r.ci95["koff"][0] <= KOFF <= r.ci95["koff"][1]
    with capsys.disabled():
        print(f"\n[coverage] weighted global association, {n} replicates: kon {hits['kon'] / n:.2f}, "
              f"koff {hits['koff'] / n:.2f}")
    # 100 replicates: binomial se ~2.2%; 0.88-0.995 is a ~3-sigma band (common practice)
    assert 0.88 <= hits["kon"] / n <= 0.995 and 0.88 <= hits["koff"] / n <= 0.995


def test_replicated_controls_keep_their_role_in_a_jump_dilution():
    # P = p0 + vs*t + (vi - vs)*(1 - exp(-kobs*t))/kobs (Copeland, Evaluation of Enzyme Inhibitors; from memory)
    rng = np.random.default_rng(9)
    t = np.linspace(0, 7200, 40)
    rows = []
    for rep in ("r1", "r2"):
        rows += [(a, 3 + 2.0 * a + rng.normal(0, 15), "control", rep) for a in t]
        rows += [(a, eq.jump_dilution_progress(a, 0.1, 2.0, KOFF, 3.0) + rng.normal(0, 15), "cpd", rep) for a in t]
    df = pd.DataFrame(rows, columns=["time", "signal", "curve", "replicate"])
    r = fit_table("jump-dilution", df)
    roles = {c.label: c.role for c in r.model.curves}
    assert roles == {"control · r1": "control", "control · r2": "control", "cpd · r1": "sample", "cpd · r2": "sample"}
    assert "no-control" not in r.warning_codes
    assert r.estimates["kobs"] == pytest.approx(KOFF, rel=0.2)
