"""Actions on the dashboard: open and close them on the compound page, see them by owner on the landing page."""

from __future__ import annotations

from tracker.services.actions import add_action, list_actions


def _compound_with_finding(graded):
    return next((n, g["findings"][0]) for n, g in graded.items() if g["findings"])


def test_a_lead_opens_an_action_from_a_finding_and_marks_it_done(app, demo_graded, ui, demo_engine):
    from tracker.db import queries

    name, finding = _compound_with_finding(demo_graded)
    at = ui.open(app(), "compound", krt_compound=name)
    assert "Actions" in [s.value for s in at.subheader]
    at.selectbox(key="act_rule").select(finding["rule"])
    at.selectbox(key="act_owner").select("demo-scientist")
    at.text_input(key="act_note").input("book the SPR slot")
    at.button[[b.label for b in at.button].index("Open action")].click().run()
    assert not at.exception
    (a,) = list_actions(demo_engine)
    assert (a["compound"], a["rule"], a["owner"], a["note"], a["status"]) == (name, finding["rule"], "demo-scientist", "book the SPR slot", "open")
    assert a["prompt"] == finding["prompt"]
    assert any("Action opened" in s.value for s in at.success)
    at.button(key=f"act_done_{a['id']}").click().run()
    assert [x["status"] for x in list_actions(demo_engine, include_closed=True)] == ["done"]
    ev = queries.audit_events(demo_engine, entity_type="action")
    assert list(ev["action"]) == ["create", "done"] and set(ev["actor"]) == {"demo-lead"}


def test_dropping_without_a_note_is_refused_in_one_line(app, demo_graded, ui, demo_engine):
    name, finding = _compound_with_finding(demo_graded)
    a = add_action(demo_engine, name, finding["rule"], "demo-lead", "2026-01-01", by="demo-lead")
    at = ui.open(app(), "compound", krt_compound=name)
    at.button(key=f"act_drop_{a['id']}").click().run()
    assert any("needs a note" in e.value for e in at.error)
    assert list_actions(demo_engine)[0]["status"] == "open"
    at.text_input(key=f"act_why_{a['id']}").input("covered by the PK study")
    at.button(key=f"act_drop_{a['id']}").click().run()
    assert list_actions(demo_engine, include_closed=True)[0]["status"] == "dropped"


def test_a_viewer_sees_actions_but_no_forms(app, demo_graded, ui, demo_engine):
    name, finding = _compound_with_finding(demo_graded)
    add_action(demo_engine, name, finding["rule"], "demo-scientist", "2026-01-01", by="demo-lead")
    at = ui.open(app(user="demo-viewer"), "compound", krt_compound=name)
    text = ui.text(at)
    assert "owner demo-scientist" in text and "Leads and scientists can open actions" in text
    assert "Open action" not in [b.label for b in at.button] and not [b for b in at.button if b.key and b.key.startswith("act_")]


def test_the_landing_page_shows_open_and_overdue_actions_by_owner(app, demo_graded, demo_engine):
    found = [(n, f["rule"]) for n, g in demo_graded.items() for f in g["findings"]][:3]
    add_action(demo_engine, *found[0], "demo-scientist", "2020-01-01", "long overdue", by="demo-lead")
    add_action(demo_engine, *found[1], "demo-scientist", "2999-01-01", by="demo-lead")
    add_action(demo_engine, *found[2], "demo-lead", "2999-01-01", by="demo-lead")
    at = app()
    frames = [df.value for df in at.dataframe]
    owners = next(f for f in frames if "Overdue" in f.columns)
    assert list(owners["Owner"]) == ["demo-scientist", "demo-lead"]  # most overdue first
    assert list(owners["Open"]) == [2, 1] and list(owners["Overdue"]) == [1, 0]
    late = next(f for f in frames if "Due" in f.columns)
    assert list(late["Compound"]) == [found[0][0]] and list(late["Note"]) == ["long overdue"]


def test_the_compound_page_draws_the_structure(app_ro, demo_graded, ui):
    name = next(iter(demo_graded))
    at = ui.open(app_ro(), "compound", krt_compound=name)
    drawings = [m.value for m in at.markdown if "krt-structure" in m.value]
    assert len(drawings) == 1 and "<svg" in drawings[0] and name not in drawings[0]  # no user text inside the drawing


def test_what_changed_lists_the_demo_grades_and_a_new_action(app, demo_graded, ui, demo_engine):
    import datetime as dt

    name, finding = _compound_with_finding(demo_graded)
    add_action(demo_engine, name, finding["rule"], "demo-scientist", "2026-01-01", by="demo-lead")
    at = ui.open(app(), "changes", ch_date=dt.date(2000, 1, 1))
    assert at.title[0].value == "What changed"
    frames = {d.value.columns[0] + str(len(d.value)): d.value for d in at.dataframe}
    grades = next(d.value for d in at.dataframe if "Direction" in d.value.columns)
    assert len(grades) == len(demo_graded) and set(grades["Direction"]) == {"new"}
    opened = next(d.value for d in at.dataframe if "Owner" in d.value.columns)
    assert list(opened["Compound"]) == [name] and frames


def test_a_review_pack_draws_structures_and_says_what_changed_since_the_last_pack(demo_engine, demo_graded):
    from tracker.services.history import record_pack
    from tracker.ui.review_pack import build_pack

    names = list(demo_graded)[:2]
    first = build_pack(demo_engine, compounds=names, with_charts=False)
    assert first.count('<img class="structure" alt="structure drawing" src="data:image/svg+xml;base64,') == 2
    assert "this is the first" in first
    record_pack(demo_engine, first, "demo-lead")
    name, finding = _compound_with_finding(demo_graded)
    add_action(demo_engine, name, finding["rule"], "demo-scientist", "2026-01-01", by="demo-lead")
    second = build_pack(demo_engine, compounds=names, with_charts=False)
    assert "Since the last pack" in second and f"action opened #1 {name} {finding['rule']}" in second
