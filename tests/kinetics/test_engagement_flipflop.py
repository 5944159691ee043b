"""Deep flip-flop absorption (tmax many elimination time constants long): onset, offset and peak stay right.

Reference (computed: scipy solve_ivp LSODA rtol 1e-10, atol 1e-14, threshold events) of
d(theta)/dt = kon C (1 - theta) - koff theta with the Bateman function (IUPAC Gold Book) in its
flip-flop branch, ka < ke, tmax = ln(ka/ke)/(ka - ke) (Garrett 1994, J Pharmacokinet Biopharm
22:103-128 for the ka = ke limit).  With tmax = T/ke, ka = ke e^-T roughly, so absorption lasts ~e^T/ke.
Tolerance 1e-4 relative, the stated tolerance of the exponential integrator.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from tracker.errors import InputError
from tracker.kinetics import pk
from tracker.kinetics.engagement import engagement_metrics

H = 3600.0
NM = 1e-9
HL = 2 * H
KE = math.log(2) / HL


def reference(kon, koff, cmax, tmax, thr):
    """onset, offset (computed: solve_ivp LSODA rtol 1e-10)."""
    ka = float(pk.absorption_rate_from_tmax(tmax, KE))

    def shape(t):
        return (math.exp(-ka * t) - math.exp(-KE * t)) / (KE - ka)

    scale = cmax / shape(tmax)
    up = lambda _t, y: y[0] - thr  # noqa: E731
    up.direction = 1
    down = lambda _t, y: y[0] - thr  # noqa: E731
    down.direction = -1
    sol = solve_ivp(lambda t, y: [kon * scale * shape(t) * (1 - y[0]) - koff * y[0]], (0, 60 / ka), [0.0], method="LSODA",
                    rtol=1e-10, atol=1e-14, events=[up, down], first_step=1e-6)
    return sol.t_events[0][0], sol.t_events[1][-1]


@pytest.mark.parametrize("T", [20, 35, 40, 50])
@pytest.mark.parametrize("kinetics", [(1e6, 1e-4, 10 * NM, 0.3), (1e5, 1e-5, 1 * NM, 0.5), (1e7, 1e-2, 3 * NM, 0.5)],
                         ids=["moderate", "slow", "fast"])
def test_deep_flip_flop_onset_and_offset_match_solve_ivp(T, kinetics):
    # computed: scipy solve_ivp LSODA rtol 1e-10; before the fix T = 50 gave an onset 7e7 x too late
    kon, koff, cmax, thr = kinetics
    m = engagement_metrics(kon, koff, "oral", cmax, T / KE, HL, thr)
    onset, offset = reference(kon, koff, cmax, T / KE, thr)
    assert float(m.onset_s) == pytest.approx(onset, rel=1e-4)
    assert float(m.offset_s) == pytest.approx(offset, rel=1e-4)
    # on the near-flat plateau the peak is the rapid-equilibrium occupancy at Cmax (binding keeps up)
    assert float(m.peak_occupancy) == pytest.approx(cmax / (cmax + koff / kon), rel=1e-6)


def test_a_tmax_beyond_fifty_elimination_time_constants_is_refused_with_a_clear_message():
    with pytest.raises(InputError, match="more than 50 elimination time constants"):
        engagement_metrics(1e6, 1e-4, "oral", 10 * NM, 51 / KE, HL, 0.3)
    assert np.isfinite(float(engagement_metrics(1e6, 1e-4, "oral", 10 * NM, 50 / KE, HL, 0.3).onset_s))
