"""Chart builders, the palette and the read layer the pages use."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tracker.ui import charts, data, theme


def _layers(spec: dict) -> list[dict]:
    if "layer" in spec:
        return [leaf for layer in spec["layer"] for leaf in _layers(layer)]
    if "spec" in spec:
        return _layers(spec["spec"])
    return [spec]


def _titles(chart) -> set[str]:
    out = set()
    for layer in _layers(chart.to_dict()):
        for ch in ("x", "y"):
            enc = layer.get("encoding", {}).get(ch, {})
            if isinstance(enc, dict) and enc.get("title"):
                out.add(enc["title"])
    return out


def _values(chart, field: str) -> list[float]:
    spec = chart.to_dict()
    vals = []
    for rows in spec.get("datasets", {}).values():
        vals += [r[field] for r in rows if field in r and r[field] is not None]
    return vals


def test_every_axis_title_names_its_unit():
    aff = charts.apparent_affinity_chart(
        charts.apparent_affinity_frame(1e-9, 1 / 21600, np.geomspace(60, 86400, 20)),
        pd.DataFrame({"incubation_h": [1.0], "value_nM": [4.0], "assay": ["a"], "readout": ["KD"]}), rt_h=6.0, kd_nM=1.0)
    eng = charts.engagement_chart(charts.engagement_frame({"t_s": np.linspace(0, 86400, 50), "conc_M": np.full(50, 1e-8),
                                                           "occupancy": np.linspace(0, 0.9, 50), "occupancy_rapid": np.full(50, 0.9)}),
                                  threshold=0.5, onset_max_h=2.0, offset_max_h=8.0)
    kmap = charts.kinetic_map_chart(pd.DataFrame({"compound": ["A"], "series": ["s"], "stage": ["hit"], "grade_label": [theme.grade_label("high")],
                                                  "kon": [1e6], "koff": [1e-4], "rt_text": ["2.8 h"], "kd_nM": [0.1]}),
                                    floor_kd_M=2e-10, incubation_s=3600)
    units = {"(h, log scale)", "(nM, log scale)", "(h)", "(% occupied)", "(/s, log scale)", "(/M/s, log scale)"}
    for chart in (aff, eng, kmap):
        titles = _titles(chart)
        assert titles, chart
        for t in titles:
            assert any(u in t for u in units), t


def test_log_axes_never_receive_zero_or_negative_values():
    curve = pd.DataFrame({"incubation_h": [0.0, 0.5, 1.0], "apparent_nM": [5.0, -1.0, 2.0], "fold": [1.0, 1.0, 1.0]})
    measured = pd.DataFrame({"incubation_h": [0.0, 1.0], "value_nM": [3.0, 0.0], "assay": ["a", "b"], "readout": ["KD", "KD"]})
    chart = charts.apparent_affinity_chart(curve, measured, rt_h=None, kd_nM=None)
    assert min(_values(chart, "incubation_h")) > 0
    assert min(_values(chart, "apparent_nM")) > 0
    assert _values(chart, "value_nM") == []  # the only measured row on the log axes had a zero


def test_a_dose_response_fit_drops_zero_concentrations_from_its_log_axis():
    from tracker.kinetics.fitting import fit_ki_shift

    conc = np.tile(np.r_[0.0, np.geomspace(1e-10, 1e-6, 9)], 2)
    inc = np.repeat([1800.0, 14400.0], 10)
    ic50 = np.where(inc == 1800.0, 3e-8, 3e-9)
    y = 100 / (1 + np.where(conc > 0, conc / ic50, 0.0))
    fit = fit_ki_shift(conc, y, inc)
    raw = pd.DataFrame({"concentration_M": conc, "signal": y, "incubation_s": inc})
    points, curves, x_title, kind = charts.fit_frames(fit.to_dict(), raw)
    assert kind == "conc" and "nM" in x_title
    assert (points["x"] > 0).all() and len(points) == 18
    assert set(curves["curve"]) == set(fit.curve_labels)
    assert curves[["lo", "hi"]].notna().all().all()


def test_every_grade_the_grader_can_give_has_one_colour_and_one_label():
    from tracker.rules.config import GRADES

    for g in GRADES:
        style = theme.grade_style(g)
        assert style is not theme.UNGRADED, g
    labels = [theme.grade_label(g) for g in GRADES]
    colours = [theme.grade_style(g).colour for g in GRADES]
    assert len(set(labels)) == len(GRADES) and len(set(colours)) == len(GRADES)
    assert theme.grade_label(None) == theme.UNGRADED.badge


def test_the_summary_query_filters_in_sql(shared_engine, demo_graded):
    everything = data.read_compound_summary(shared_engine)
    assert set(everything["compound"]) == set(demo_graded)
    only = data.read_compound_summary(shared_engine, data.SummaryFilter(program="Tallowmoor", stages=("hit-to-lead",)))
    expected = {n for n, g in demo_graded.items() if g["program"] == "Tallowmoor" and g["stage"] == "hit-to-lead"}
    assert set(only["compound"]) == expected
    found = data.read_compound_summary(shared_engine, data.SummaryFilter(search="qm-201"))
    assert set(found["compound"]) == {n for n in demo_graded if n.lower().startswith("qm-201")}


def test_best_potency_is_the_tightest_value_with_its_own_incubation(shared_engine):
    from tracker.db import queries

    pot = queries.potency(shared_engine)
    summary = data.read_compound_summary(shared_engine).set_index("compound")
    for name, rows in pot.groupby("compound"):
        best = rows.sort_values(["value_M", "id"]).iloc[0]
        assert summary.loc[name, "best_potency_M"] == pytest.approx(best["value_M"])
        assert summary.loc[name, "best_incubation_s"] == pytest.approx(best["incubation_s"])


def _map(n_series: int, **kw):
    pts = pd.DataFrame({"compound": [f"QX-{i}" for i in range(n_series)], "series": [f"S{i}" for i in range(n_series)],
                        "stage": ["hit"] * n_series, "grade_label": [theme.grade_label("high")] * n_series,
                        "kon": np.geomspace(1e5, 1e7, n_series), "koff": np.geomspace(1e-5, 1e-2, n_series),
                        "rt_text": ["1 h"] * n_series, "kd_nM": [1.0] * n_series})
    return charts.kinetic_map_chart(pts, **kw).to_dict()


def _point_layer(spec: dict) -> dict:
    return next(layer for layer in spec["layer"] if "shape" in layer.get("encoding", {}))


def test_kinetic_map_shows_grade_by_colour_alone_and_every_series_by_a_distinct_visible_shape():
    layer = _point_layer(_map(6))
    enc = layer["encoding"]
    # grade: colour only, with plain swatches (no marker shapes that mean series elsewhere)
    assert enc["color"]["legend"]["symbolType"] == "square"
    # series: one distinct shape each, drawn outlined in the legend so none is invisible
    shapes = enc["shape"]["scale"]["range"]
    assert len(set(shapes)) == 6
    assert enc["shape"]["legend"]["symbolFillColor"] == "white" and enc["shape"]["legend"]["symbolStrokeWidth"] > 0
    # the grade legend's entries are names without the badge glyphs (which are shapes)
    assert not any(g.glyph in label for g in theme.GRADES.values() for label in enc["color"]["scale"]["domain"])
    assert {t["field"] for t in enc["tooltip"]} >= {"compound", "series", "grade_name"}  # labels on hover


def test_kinetic_map_can_print_compound_names_beside_the_points():
    without = _map(3)
    with_names = _map(3, labels=True)
    text_layers = lambda spec: [l for l in spec["layer"] if l.get("encoding", {}).get("text", {}).get("field") == "compound"]  # noqa: E731
    assert not text_layers(without)
    assert len(text_layers(with_names)) == 1


def test_the_stage_chart_labels_every_stage_and_counts_in_whole_numbers():
    from tracker.domain import STAGES

    df = pd.DataFrame({"program": ["P", "P"], "stage": ["hit", "candidate"], "grade_label": [theme.grade_label("high")] * 2,
                       "n": [1, 2]})
    spec = charts.grade_counts_chart(df).to_dict()
    enc = spec["spec"]["encoding"]
    # all six stages are on the axis even when only two hold compounds, and no label is dropped for overlap
    assert enc["x"]["scale"]["domain"] == list(STAGES)
    assert enc["x"]["axis"]["labelOverlap"] is False
    assert enc["y"]["axis"]["tickMinStep"] == 1 and enc["y"]["axis"]["format"] == "d"
