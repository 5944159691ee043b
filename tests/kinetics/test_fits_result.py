"""The FitResult contract: frozen, plain-JSON round trip, redrawable curves and bands."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from tracker.kinetics import equations as eq
from tracker.kinetics.fitting import (
    SCHEMA_VERSION,
    FitResult,
    fit_association,
    fit_competition_kinetics,
    fit_dissociation,
    fit_ki_shift,
)


@pytest.fixture(scope="module")
def diss():
    t = np.linspace(0, 3600, 40)
    y = eq.one_phase_decay(t, 1e-3, 1000.0, 50.0) + np.random.default_rng(5).normal(0, 10, t.size)
    return fit_dissociation(t, y)


@pytest.fixture(scope="module")
def assoc():
    t = np.tile(np.linspace(0, 1800, 30), 3)
    L = np.repeat([2e-9, 1e-8, 5e-8], 30)
    y = eq.association(t, L, 1e6, 1e-3, 1000.0) + np.random.default_rng(6).normal(0, 10, t.size)
    return fit_association(t, y, L)


def test_a_fit_result_cannot_be_changed_after_the_fit(diss):
    with pytest.raises(dataclasses.FrozenInstanceError):
        diss.method = "other"  # type: ignore[misc]


def test_to_dict_is_strict_json_and_carries_the_schema_version(diss, assoc):
    for r in (diss, assoc):
        text = json.dumps(r.to_dict(), allow_nan=False)
        assert json.loads(text)["schema_version"] == SCHEMA_VERSION
        json.dumps(r.to_json_keys(), allow_nan=False)


def test_a_stored_fit_restores_its_estimates_and_redraws_the_same_curve(assoc):
    back = FitResult.from_dict(json.loads(json.dumps(assoc.to_dict())))
    assert back.estimates == pytest.approx(assoc.estimates)
    assert back.warnings == assoc.warnings and back.ci_kind == assoc.ci_kind
    t = np.linspace(0, 2000, 7)
    for label in assoc.curve_labels:
        np.testing.assert_allclose(back.curve(t, label), assoc.curve(t, label), rtol=1e-12)
        np.testing.assert_allclose(back.band(t, label)[1], assoc.band(t, label)[1], rtol=1e-9)


def test_the_fitted_curve_is_the_closed_form_at_the_estimates(assoc):
    e = assoc.estimates
    t = np.linspace(0, 1800, 10)
    label = assoc.curve_labels[1]
    expected = e["baseline"] + eq.association(t, 1e-8, e["kon"], e["koff"], e["bmax"])
    np.testing.assert_allclose(assoc.curve(t, label), expected, rtol=1e-12)


def test_the_confidence_band_brackets_the_curve_and_is_narrow_where_data_are_dense(diss):
    t = np.linspace(0, 3600, 25)
    lo, hi = diss.band(t)
    y = diss.curve(t)
    assert np.all(lo < y) and np.all(y < hi)
    assert np.max(hi - lo) < 4 * diss.residual_sd  # a band of the mean curve, not a prediction band


def test_quality_figures_are_reported_by_their_usual_names(diss):
    assert diss.n_points == 40 and diss.n_params == 3 and diss.success
    ssr = diss.residual_sd**2 * (diss.n_points - diss.n_params)
    # least-squares AIC = n*ln(SSR/n) + 2k (as in lmfit; Burnham & Anderson, from memory)
    assert diss.aic == pytest.approx(40 * np.log(ssr / 40) + 2 * 3, rel=1e-9)
    assert 0.99 < diss.r_squared <= 1


def test_a_curve_must_be_named_when_a_fit_has_several(assoc):
    with pytest.raises(ValueError, match="name the curve"):
        assoc.curve([0.0])


def test_open_interval_limits_are_null_in_json():
    t = np.linspace(0, 3600, 30)
    y = 1000 + np.random.default_rng(53).normal(0, 10, t.size)
    d = fit_dissociation(t, y).to_json_keys()
    assert d["koff_ci95_per_s"][0] == 0.0
    assert d["residence_time_ci95_s"][1] is None  # 1/0: unbounded above


def test_competition_and_ki_shift_results_round_trip_through_json():
    k1, k2 = 1e7, 1e-2
    conc = np.array([0, 1e-8, 1e-7])
    t = np.tile(np.linspace(0, 3600, 30), 3)
    I = np.repeat(conc, 30)
    y = eq.motulsky_mahan(t, 1e-9, k1, k2, I, 1e6, 1e-3, 100.0) + np.random.default_rng(2).normal(0, 0.5, t.size)
    mm = fit_competition_kinetics(t, y, I, tracer_kon=k1, tracer_koff=k2, tracer_conc=1e-9)
    dose = np.tile(np.geomspace(1e-10, 1e-5, 11), 2)
    ks = fit_ki_shift(dose, eq.logistic4(dose, 0, 100, np.repeat([3e-8, 1e-8], 11), 1.0)
                      + np.random.default_rng(3).normal(0, 1, 22), np.repeat([600.0, 7200.0], 11))
    for r in (mm, ks):
        back = FitResult.from_dict(json.loads(json.dumps(r.to_dict(), allow_nan=False)))
        for label in r.curve_labels:
            x = np.geomspace(1e-10, 1e-5, 5) if r is ks else np.linspace(0, 3600, 5)
            np.testing.assert_allclose(back.curve(x, label), r.curve(x, label), rtol=1e-12)


def test_the_estimates_intervals_and_extras_of_a_result_are_read_only(assoc):
    with pytest.raises(TypeError):
        assoc.estimates["koff"] = 1.0  # type: ignore[index]
    with pytest.raises(TypeError):
        assoc.ci95["koff"] = (0.0, 1.0)  # type: ignore[index]
    with pytest.raises(TypeError):
        assoc.extras["kobs_line"]["slope"] = 0.0  # nested mappings are read-only too
    assert isinstance(assoc.warnings, tuple) and isinstance(assoc.model.curves, tuple)


def test_a_result_survives_pickling_and_deep_copies_unchanged(assoc):
    import copy
    import pickle

    for back in (pickle.loads(pickle.dumps(assoc)), copy.deepcopy(assoc)):
        assert back.to_dict() == assoc.to_dict()
        with pytest.raises(TypeError):
            back.estimates["kon"] = 0.0  # type: ignore[index]


def test_the_flat_notebook_api_exports_the_fits_and_closed_forms():
    import tracker.kinetics as kin

    for name in ("fit_dissociation", "fit_association", "fit_competition_kinetics", "fit_morrison", "fit_table",
                 "FitResult", "association", "motulsky_mahan", "morrison_fraction", "depletion_association"):
        assert name in kin.__all__ and callable(getattr(kin, name)) or name == "FitResult"
    from tracker.kinetics import fit_dissociation as fd  # the failing import

    assert fd is fit_dissociation
