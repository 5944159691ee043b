"""Calibration of the 95% intervals: how often they cover the true koff.

Replicates are simulated from the one-phase dissociation closed form (Copeland,
Pompliano & Meek 2006, Nat Rev Drug Discov 5:730: B = B0*exp(-koff*t) + NSB)
with seeded Gaussian noise.  A calibrated 95% interval covers the truth in
95% of replicates; with 300 replicates the binomial standard error is ~1.3%,
so 0.90-0.99 is a > 3-sigma acceptance band (common practice for
simulation-based coverage checks).
"""

from __future__ import annotations

import numpy as np
import pytest

from tracker.kinetics import equations as eq
from tracker.kinetics.fitting import fit_dissociation

KOFF = 1e-3


def coverage(n, t, sd, seed, **kw):
    rng = np.random.default_rng(seed)
    hits, kinds = 0, {}
    for _ in range(n):
        y = eq.dissociation(t, KOFF, 1000.0, 50.0) + rng.normal(0, sd, t.size)
        r = fit_dissociation(t, y, check_biphasic=False, **kw)
        lo, hi = r.ci95["koff"]
        hits += lo <= KOFF <= hi
        kinds[r.ci_kind] = kinds.get(r.ci_kind, 0) + 1
    return hits / n, kinds


@pytest.mark.slow
def test_koff_intervals_cover_the_truth_about_95_percent_of_the_time(capsys):
    # well-sampled design: 3.6 residence times, 40 points, 1% noise -> covariance intervals
    cov, kinds = coverage(300, np.linspace(0, 3600, 40), 10.0, seed=101)
    with capsys.disabled():
        print(f"\n[coverage] dissociation koff, 300 replicates, well sampled: {cov:.3f} ({kinds})")
    assert 0.90 <= cov <= 0.99


@pytest.mark.slow
def test_profile_intervals_are_calibrated_when_the_window_holds_one_residence_time(capsys):
    # one residence time, 20 points, 2% noise: curvature matters, profile intervals forced
    cov, kinds = coverage(200, np.linspace(0, 1000, 20), 20.0, seed=202, intervals="profile")
    with capsys.disabled():
        print(f"\n[coverage] dissociation koff, 200 replicates, one-RT window, profile: {cov:.3f} ({kinds})")
    assert kinds == {"profile": 200}
    assert 0.90 <= cov <= 0.99
