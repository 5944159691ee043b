"""The compound page's engagement tiles show the regimen and numbers the duration-mismatch finding judged."""

from __future__ import annotations

from tracker import fmt
from tracker.ui import widgets


def test_tiles_of_the_turnover_compound_match_its_finding(app_ro, demo_graded, ui):
    # HF-1015 (demo): one kinetics row and one PK row, so the page and the grader simulate the same inputs
    finding = next(f for f in demo_graded["HF-1015"]["findings"] if f["rule"] == "duration-mismatch")
    at = ui.open(app_ro(), "compound", krt_compound="HF-1015")
    text = ui.text(at)
    assert "Regimen judged: steady state on a 24 h dosing interval" in text.replace("**", "")
    assert "turnover, not dissociation, sets the duration" in text
    tiles = {m.label: m.value for m in at.metric}
    assert tiles["Time above threshold per interval"] == widgets.dur(finding["duration_above_threshold_s"])
    assert tiles["Trough (steady state)"] == fmt.pct(finding["trough_occupancy"], missing="–")
    assert tiles["Offset (after the last dose)"] == widgets.dur(finding["offset_s"])
    assert tiles["Onset (threshold reached)"] == widgets.dur(finding["onset_s"])
