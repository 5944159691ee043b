"""Every dashboard page on the demo database: what it shows, checked against the services' own answers."""

from __future__ import annotations

import pytest

from pathlib import Path

from tracker.ui import theme

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture
def graded(demo_graded):
    return demo_graded


def _with_finding(graded, severity="high", needs=()):
    for name, g in graded.items():
        for f in g["findings"]:
            if f["severity"] == severity and all(f.get(k) for k in needs):
                return name, f
    pytest.fail(f"the demo has no {severity} finding with {needs}")


def test_risk_overview_lists_every_compound_with_its_grade_label(app_ro, graded):
    at = app_ro()
    assert at.title[0].value == "Risk overview"
    table = at.dataframe[0].value
    assert set(table["Compound"]) == set(graded)
    by_name = dict(zip(table["Compound"], table["Grade"]))
    for name, g in graded.items():
        assert by_name[name] == theme.grade_label(g["grade"]), name
    # the worst grade sorts first
    first = table["Compound"].iloc[0]
    assert graded[first]["grade"] == "high"


def test_risk_overview_counts_grades_and_draws_the_stage_chart(app_ro, graded, ui):
    at = app_ro()
    metrics = {m.label: m.value for m in at.metric}
    n_high = sum(1 for g in graded.values() if g["grade"] == "high")
    assert metrics[theme.GRADES["high"].badge] == str(n_high)
    assert ui.charts(at) >= 1


def test_compound_evidence_shows_findings_prompts_cautions_and_charts(app_ro, graded, ui, shared_engine):
    from tracker.db import queries

    pk = queries.pk(shared_engine)
    kin = queries.kinetics(shared_engine)
    both = set(pk["compound"]) & set(kin["compound"])
    name = next(n for n in graded if n in both and any(f.get("caution") for f in graded[n]["findings"]))
    at = ui.open(app_ro(), "compound", krt_compound=name)
    text = ui.text(at)
    assert at.title[0].value == "Compound evidence"
    for f in graded[name]["findings"]:
        assert f["prompt"] in text
    caution = next(f["caution"] for f in graded[name]["findings"] if f.get("caution"))
    assert caution[:60] in text
    assert theme.grade_label(graded[name]["grade"]) in text
    # affinity-vs-incubation and engagement charts (plus any stored fit)
    assert ui.charts(at) >= 2
    assert "Onset (threshold reached)" in text


def test_compound_evidence_draws_each_stored_fit(app_ro, ui, shared_engine):
    from tracker.db import queries

    tc = queries.time_courses(shared_engine)
    name = tc["compound"].iloc[0]
    n_fits = int((tc["compound"] == name).sum())
    at = ui.open(app_ro(), "compound", krt_compound=name)
    assert "Stored fits" in ui.text(at)
    assert ui.charts(at) >= 1 + n_fits  # the incubation chart plus one chart per stored fit


def test_kinetic_map_plots_measured_compounds_with_the_series_floor(app_ro, ui):
    at = ui.open(app_ro(), "kinetic_map")
    text = ui.text(at)
    assert "Assay floor of" in text
    assert ui.charts(at) == 1


def test_measure_next_ranks_compounds_with_a_suggested_assay(app_ro, ui, shared_engine):
    from tracker.services.queue import measurement_queue

    expected = measurement_queue(shared_engine)
    at = ui.open(app_ro(), "queue")
    table = at.dataframe[0].value
    assert list(table["Compound"]) == [e["compound"] for e in expected]
    assert table["Suggested assay"].str.len().min() > 0
    assert expected[0]["compound"] in ui.text(at)


def test_stage_gate_always_shows_the_safety_caution(app_ro, ui):
    at = ui.open(app_ro("demo-viewer"), "gate")
    warning = " ".join(w.value for w in at.warning)
    assert "not dosing advice" in warning
    assert "more target coverage than assumed" in warning
    assert "regulatory guidance" in warning


def test_stage_gate_lists_the_high_findings_that_block_the_next_stage(app_ro, graded, ui):
    from tracker.domain import STAGES

    name, finding = _with_finding(graded, "high")
    at = ui.open(app_ro(), "gate", krt_compound=name)
    assert "Choose the target stage" in ui.text(at)  # nothing is pre-selected
    at.selectbox(key="gate_to").set_value(STAGES[STAGES.index(graded[name]["stage"]) + 1]).run()
    text = ui.text(at)
    assert "What blocks this move" in text
    assert finding["message"] in text


def test_load_data_offers_a_template_for_every_table(app_ro, ui):
    from tracker.io.specs import SPECS

    at = ui.open(app_ro(), "load")
    labels = [b.label for b in at.get("download_button")]
    for table in SPECS:
        assert f"{table}.csv" in labels
    assert "workbook.xlsx" in labels


def test_audit_trail_lists_events_newest_first(app_ro, ui, shared_engine):
    from tracker.ui.data import read_version

    head, count = read_version(shared_engine)
    at = ui.open(app_ro(), "audit")
    table = at.dataframe[0].value
    assert table["#"].iloc[0] == head
    assert f"{count:,} event(s) match." in ui.text(at)
    # names, not database ids; changes as field: old -> new, not raw JSON
    assert not table["What"].str.fullmatch(r"[a-z_ ]+ \d+").any(), table["What"].tolist()
    assert not table["Change (before → after)"].str.startswith("{").any()


def test_what_if_starts_from_the_stored_grade(app_ro, graded, ui):
    name = next(n for n, g in graded.items() if g["grade"] == "high")
    at = ui.open(app_ro(), "what_if", krt_compound=name)
    text = ui.text(at)
    label = theme.grade_label("high")
    assert text.count(label) >= 2  # stored and what-if badges agree before anything moves
    assert "not dosing advice" in " ".join(w.value for w in at.warning)
    assert ui.charts(at) >= 1


def test_review_pack_page_builds_a_downloadable_pack(app_ro, ui):
    at = ui.open(app_ro(), "review_pack", krt_program="Quillmere")
    at.multiselect(key="pack_compounds").select("QM-2010").run()
    at.button(key="pack_build").click().run()
    assert not at.exception
    assert "Pack ready" in ui.text(at)
    assert any(b.label.startswith("Download review pack") for b in at.get("download_button"))


def test_the_dashboard_reads_the_same_portfolio_on_each_backend(db_url, engine, app, ui):
    from tracker.services.demo import load_demo
    from tracker.services.grading import grade_portfolio

    load_demo(engine)
    expected = {g["compound"]: theme.grade_label(g["grade"]) for g in grade_portfolio(engine)}
    at = app(url=db_url)
    table = at.dataframe[0].value
    assert dict(zip(table["Compound"], table["Grade"])) == expected
    at = ui.open(at, "audit")
    at.button(key="audit_verify").click().run()
    assert any("audit chain intact" in s.value for s in at.success)
    at = ui.open(at, "kinetic_map")
    assert ui.charts(at) == 1


def test_an_empty_database_gets_one_clear_line_instead_of_pages(monkeypatch, tmp_path):
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("KRT_DATABASE_URL", f"sqlite:///{tmp_path / 'never-migrated.sqlite'}")
    at = AppTest.from_file(str(REPO / "app.py"), default_timeout=60).run()
    assert not at.exception
    assert [e.value for e in at.error] == ["the database is empty: run `krt db upgrade` (or `krt demo load` for the demo)"]
    assert not at.dataframe
