"""Morrison tight-binding fit: Kapp from a dose-response when enzyme and inhibitor are comparable.

The Morrison equation (Morrison 1969, Biochim Biophys Acta 185:269-286; volume and pages from memory) is the
exact root of the mass balance E + I <-> EI with Kapp = [E][I]/[EI]; the reference here solves that balance
with scipy brentq (computed).  IC50 = Kapp + E/2: Copeland et al. 1995, Bioorg Med Chem Lett 5:1947-1952.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from tracker.domain import FIT_METHODS
from tracker.errors import FitError
from tracker.kinetics import equations as eq
from tracker.kinetics import fit_morrison, fit_table


def free_fraction(I, E, K):
    # EI from (E - EI)(I - EI) = K*EI on 0 <= EI <= min(E, I) (computed: scipy brentq, xtol 1e-30)
    if I == 0:
        return 1.0
    ei = brentq(lambda c: (E - c) * (I - c) - K * c, 0.0, min(E, I), xtol=1e-30, rtol=1e-14)
    return 1.0 - ei / E


@pytest.mark.parametrize("E,K", [(1e-9, 1e-9), (1e-8, 1e-10), (1e-10, 1e-8), (5e-9, 2e-11)])
def test_the_morrison_equation_is_the_root_of_the_mass_balance(E, K):
    I = np.r_[0.0, np.geomspace(1e-12, 1e-6, 25)]
    ref = [free_fraction(i, E, K) for i in I]
    np.testing.assert_allclose(eq.morrison_fraction(I, E, K), ref, rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("E,K", [(1e-9, 1e-9), (1e-8, 1e-10), (2e-10, 3e-9)])
def test_half_activity_is_at_kapp_plus_half_the_enzyme(E, K):
    # IC50 = Kapp + E/2 (Copeland et al. 1995, Bioorg Med Chem Lett 5:1947)
    assert eq.morrison_fraction(K + E / 2, E, K) == pytest.approx(0.5, rel=1e-10)


def test_at_vanishing_enzyme_the_curve_is_the_hyperbola():
    I = np.geomspace(1e-12, 1e-6, 20)
    np.testing.assert_allclose(eq.morrison_fraction(I, 1e-18, 1e-9), 1 / (1 + I / 1e-9), rtol=1e-8)


@pytest.fixture(scope="module")
def tight():
    E, KI = 5e-9, 1e-9
    x = np.r_[0.0, 0.0, np.geomspace(1e-11, 1e-6, 16)]
    v = 2.0 + 100.0 * eq.morrison_fraction(x, E, KI) + np.random.default_rng(41).normal(0, 1.5, x.size)
    return x, v, E, KI


def test_morrison_recovers_kapp_with_an_interval_where_the_ic50_would_mislead(tight):
    x, v, E, KI = tight
    r = fit_morrison(x, v, E)
    assert r.ci95["kapp"][0] <= KI <= r.ci95["kapp"][1]
    assert r.estimates["kapp"] == pytest.approx(KI, rel=0.3)
    assert r.estimates["ic50"] == pytest.approx(r.estimates["kapp"] + E / 2, rel=1e-12)
    assert r.estimates["ic50"] > 3 * KI  # the plain IC50 overstates Ki 3.5-fold here
    assert "enzyme-conc-matters" in r.warning_codes
    keys = r.to_json_keys()
    assert keys["kapp_M"] == r.estimates["kapp"] and keys["method"] == "morrison"


def test_a_competitive_kapp_converts_to_ki_with_substrate_and_km(tight):
    x, v, E, KI = tight
    r = fit_morrison(x, v, E, substrate_conc=2e-6, km=1e-6)
    # Ki = Kapp/(1 + S/Km) for a competitive inhibitor (common practice)
    assert r.estimates["ki"] == pytest.approx(r.estimates["kapp"] / 3.0, rel=1e-12)


def test_a_titration_is_flagged_when_kapp_is_far_below_the_enzyme():
    E = 1e-7
    x = np.r_[0.0, np.geomspace(1e-10, 1e-6, 16)]
    v = 100.0 * eq.morrison_fraction(x, E, 1e-11) + np.random.default_rng(42).normal(0, 1.0, x.size)
    assert "titration" in fit_morrison(x, v, E).warning_codes


def test_morrison_is_a_fit_method_and_fit_table_needs_the_enzyme(tight):
    x, v, E, KI = tight
    assert "morrison" in FIT_METHODS
    df = pd.DataFrame({"concentration": x, "signal": v})
    with pytest.raises(FitError, match="enzyme"):
        fit_table("morrison", df)
    r = fit_table("morrison", df, enzyme_conc=E, weights="none")
    assert r.method == "morrison" and r.estimates["kapp"] == pytest.approx(fit_morrison(x, v, E).estimates["kapp"])
    with pytest.raises(FitError, match="positive"):
        fit_morrison(x, v, 0.0)
