"""Interactions: filter, select, gate decisions by a lead and by a viewer, uploads, integrity check, what-if."""

from __future__ import annotations

import dataclasses
import json

import pytest
from sqlalchemy import text

from tracker.domain import STAGES
from tracker.ui import theme


@pytest.fixture
def graded(demo_graded):
    return demo_graded


def _blocked_one_step(graded):
    """A compound with a high finding whose next stage exists (a forward gate it blocks)."""
    for name, g in graded.items():
        if g["stage"] != STAGES[-1] and any(f["severity"] == "high" for f in g["findings"]):
            return name, g
    pytest.fail("the demo has no compound blocked by a high finding")


# ------------------------------------------------------------------ overview
def test_filtering_by_program_shows_only_that_programs_compounds(app_ro, graded):
    at = app_ro()
    at.selectbox(key="krt_program").select("Quillmere").run()
    assert not at.exception
    table = at.dataframe[0].value
    expected = {n for n, g in graded.items() if g["program"] == "Quillmere"}
    assert set(table["Compound"]) == expected


def test_the_landing_table_answers_grade_need_rt_worst_fold_and_best_potency_in_one_line(app_ro, graded):
    from tracker import fmt

    at = app_ro()
    table = at.dataframe[0].value.set_index("Compound")
    # what the lead reads, and nothing that pushes it sideways at 1440 px
    assert list(table.columns) == ["Grade", "Stage", "What it needs", "RT", "Worst fold", "Best potency"]
    for name, g in graded.items():
        row = table.loc[name]
        assert row["Grade"] == theme.grade_label(g["grade"])
        if g["findings"]:
            worst = min(g["findings"], key=lambda f: {"high": 0, "moderate": 1, "low": 2}.get(f["severity"], 9))
            prompt = " ".join(worst["prompt"].split())
            assert row["What it needs"].rstrip("…") == prompt[: len(row["What it needs"].rstrip("…"))]
            assert len(row["What it needs"]) <= 110
        else:
            assert row["What it needs"] == "nothing flagged"
        # units are part of the cell: RT in s/min/h/d, potency in M with an SI prefix
        assert row["RT"] == "–" or row["RT"].split()[-1] in ("s", "min", "h", "d")
        assert row["Best potency"] == "–" or row["Best potency"].endswith("M")


def test_the_flagged_compounds_needs_are_listed_whole_worst_first(app_ro, graded):
    from tracker.ui.widgets import md

    at = app_ro()
    text = "\n".join(m.value for m in at.markdown)
    flagged = [n for n, g in graded.items() if g["grade"] in ("high", "moderate")]
    assert "What the flagged compounds need" in text
    high = [n for n, g in graded.items() if g["grade"] == "high"]
    for name in high:
        worst = min(graded[name]["findings"], key=lambda f: {"high": 0, "moderate": 1, "low": 2}.get(f["severity"], 9))
        line = next(ln for ln in text.splitlines() if f"**{md(name)}**" in ln)
        assert line.endswith(md(" ".join(worst["prompt"].split())))  # the whole prompt, not cut
    assert len(flagged) > 12 or all(f"**{md(n)}**" in text for n in flagged)


def test_filtering_by_grade_and_stage_narrows_the_table(app_ro, graded):
    at = app_ro()
    at.multiselect(key="ov_grade").select(theme.grade_label("high")).run()
    at.multiselect(key="ov_stage").select("candidate").run()
    table = at.dataframe[0].value
    expected = {n for n, g in graded.items() if g["grade"] == "high" and g["stage"] == "candidate"}
    assert expected and set(table["Compound"]) == expected


def test_selecting_a_row_opens_that_compounds_evidence(app_ro, ui):
    at = app_ro()
    table = at.dataframe[0].value
    name = table["Compound"].iloc[2]
    at.session_state["overview_table"] = {"selection": {"rows": [2], "columns": [], "cells": []}}
    at.run()
    assert not at.exception
    assert at.title[0].value == "Compound evidence"
    assert at.selectbox(key="pick_krt_compound").value == name
    assert any(ui.shown(s.value) == name for s in at.subheader)
    at.switch_page("tracker/ui/views/overview.py").run()  # coming back does not re-open the old selection
    assert at.title[0].value == "Risk overview"


# ------------------------------------------------------------------ gate
def _decide(at, rule_reasons: dict[str, str], reason: str, password: str | None = None):
    from tracker.services.demo import DEMO_PASSWORD

    for rule in rule_reasons:
        at.checkbox(key=f"gate_waive_{rule}").check().run()
    for rule, why in rule_reasons.items():
        at.text_input(key=f"gate_why_{rule}").input(why)
    at.text_area(key="gate_reason").input(reason)
    at.text_input(key="gate_password").input(DEMO_PASSWORD if password is None else password)
    at.button(key="gate_record").click().run()
    assert not at.exception, [e.value for e in at.exception]
    return confirm(at)


def confirm(at):
    """The gate's confirmation step: click "Confirm and sign" when it is shown."""
    if "gate_confirm" in [b.key for b in at.button]:
        at.button(key="gate_confirm").click().run()
        assert not at.exception, [e.value for e in at.exception]
    return at


def choose_next(at, stage: str):
    at.selectbox(key="gate_to").set_value(STAGES[STAGES.index(stage) + 1]).run()
    return at


def test_a_lead_waives_the_blocking_finding_and_the_approval_lands_in_the_audit_trail(app, graded, ui, demo_engine):
    from tracker.db import queries

    name, g = _blocked_one_step(graded)
    to = STAGES[STAGES.index(g["stage"]) + 1]
    high = sorted({f["rule"] for f in g["findings"] if f["severity"] == "high"})
    at = ui.open(app("demo-lead"), "gate", krt_compound=name)
    assert at.selectbox(key="gate_to").value is None  # nothing pre-selected
    choose_next(at, g["stage"])
    _decide(at, {r: f"accepted at review: {r}" for r in high}, "portfolio review: kinetics follow-up agreed")
    assert any(ui.shown(s.value).startswith(f"Approved: {name} moved {g['stage']} → {to}") for s in at.success)

    stage = queries.compounds(demo_engine).set_index("name").loc[name, "stage"]
    assert stage == to
    events = queries.audit_events(demo_engine, actor="demo-lead")
    assert "gate-approved" in set(events["action"])
    waived = events[events["action"] == "waive"]
    assert {r for r in high} <= {json.loads(a)["rule"] for a in waived["after_json"]}

    at = ui.open(at, "audit")
    log = at.dataframe[0].value
    assert {"gate-approved", "waive", "stage-change"} <= set(log["Action"].head(10))
    assert set(log.loc[log["Action"].isin(["gate-approved", "waive"]), "Who"]) == {"demo-lead"}


def test_a_lead_who_does_not_waive_is_refused_and_the_attempt_is_recorded(app, graded, ui, demo_engine):
    from tracker.db import queries

    name, g = _blocked_one_step(graded)
    at = ui.open(app("demo-lead"), "gate", krt_compound=name)
    choose_next(at, g["stage"])
    _decide(at, {}, "trying without a waiver")
    assert any("gate refused" in e.value and "unwaived high finding" in e.value for e in at.error)
    assert queries.compounds(demo_engine).set_index("name").loc[name, "stage"] == g["stage"]
    assert "gate-refused" in set(queries.audit_events(demo_engine, actor="demo-lead")["action"])


def test_a_viewer_sees_no_waive_or_approve_controls_and_the_service_refuses_the_same_attempt(app, graded, ui, demo_engine):
    from tracker.db import queries
    from tracker.ui.views.gate import record_decision

    name, g = _blocked_one_step(graded)
    to = STAGES[STAGES.index(g["stage"]) + 1]
    high = {f["rule"] for f in g["findings"] if f["severity"] == "high"}
    at = ui.open(app("demo-viewer"), "gate", krt_compound=name)
    assert "gate_record" not in [b.key for b in at.button]
    assert not [c for c in at.checkbox if (c.key or "").startswith("gate_waive_")]
    assert "Only a lead can waive findings and record a gate decision" in ui.text(at)

    from tracker.services.demo import DEMO_PASSWORD

    ok, message = record_decision(demo_engine, "demo-viewer", name, to, "viewer tries", {r: "viewer waiver" for r in high},
                                  password=DEMO_PASSWORD)
    assert not ok
    assert "only a lead may decide gates" in message
    assert queries.compounds(demo_engine).set_index("name").loc[name, "stage"] == g["stage"]
    refused = queries.audit_events(demo_engine, actor="demo-viewer")
    assert list(refused["action"]) == ["gate-refused", "sign"]  # the attempt, signed "refused"


# ------------------------------------------------------------------ load data
BAD_POTENCY = (
    "compound,assay,readout,value,incubation,format\n"
    "HF-1001,binding 2h,KD,3.2 parsecs,2 h,binding\n"
    "NO-SUCH-1,binding 2h,KD,1 nM,2 h,binding\n"
    "HF-1002,binding 2h,KD,1 nM,-5 min,binding\n"
)


def test_a_bad_upload_lists_every_line_column_error_and_writes_nothing(app, ui, demo_engine):
    from tracker.db import queries

    before = queries.counts(demo_engine)
    at = ui.open(app("demo-scientist"), "load")
    at.file_uploader[0].set_value(("potency.csv", BAD_POTENCY.encode(), "text/csv")).run()
    assert not at.exception
    listing = at.code[0].value.splitlines()
    assert any(line.startswith("potency.csv:2: value:") for line in listing)
    assert any(line.startswith("potency.csv:3: compound:") and "NO-SUCH-1" in line for line in listing)
    assert any(line.startswith("potency.csv:4: incubation:") for line in listing)
    assert "load_commit" not in [b.key for b in at.button]
    assert queries.counts(demo_engine) == before


def test_a_valid_upload_is_previewed_then_committed_in_one_step(app, ui, demo_engine):
    from tracker.db import queries

    csv = "compound,program,series,stage\nHF-9001,Heronfield,HF-amide,hit\nHF-9002,Heronfield,HF-urea,hit\n"
    imports_before = queries.audit_events(demo_engine, actor="demo-scientist", action="import", entity_type="compounds")
    at = ui.open(app("demo-scientist"), "load")
    at.file_uploader[0].set_value(("compounds.csv", csv.encode(), "text/csv")).run()
    preview = at.dataframe[0].value
    assert preview.set_index("Table").loc["compounds", "New"] == 2
    assert "HF-9001" not in set(queries.compounds(demo_engine)["name"])  # validation wrote nothing
    at.button(key="load_commit").click().run()
    assert not at.exception
    assert any("Imported: 2 row(s) written" in s.value for s in at.success)
    assert {"HF-9001", "HF-9002"} <= set(queries.compounds(demo_engine)["name"])
    created = queries.audit_events(demo_engine, actor="demo-scientist", action="import", entity_type="compounds")
    assert len(created) == len(imports_before) + 1  # one summary event for this upload's compounds table
    newest = created.sort_values("id").iloc[-1]
    assert json.loads(newest["after_json"])["inserted"] == 2


def test_a_workbook_upload_names_sheet_line_and_column_of_each_error(app, ui, demo_engine):
    import io

    from openpyxl import load_workbook

    from tracker.db import queries
    from tracker.ui.views.load import template_xlsx

    book = load_workbook(io.BytesIO(template_xlsx()))
    book["potency"]["D2"] = "lots"  # value column of the example row
    buf = io.BytesIO()
    book.save(buf)
    before = queries.counts(demo_engine)
    at = ui.open(app("demo-scientist"), "load")
    at.file_uploader[0].set_value(("batch.xlsx", buf.getvalue(), "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet")).run()
    listing = at.code[0].value.splitlines()
    assert any(line.startswith("batch.xlsx[potency]:2: value:") for line in listing), listing
    assert queries.counts(demo_engine) == before


def test_the_downloadable_templates_import_cleanly(shared_engine, tmp_path):
    from tracker.io.specs import SPECS
    from tracker.ui.views.load import run_import, stage_files, template_csv, template_xlsx

    (tmp_path / "csv").mkdir()
    csvs = stage_files([(f"{t}.csv", template_csv(t)) for t in SPECS], tmp_path / "csv")
    check = run_import(shared_engine, csvs, tmp_path / "csv", "demo-scientist", commit=False)
    assert check["ok"], check
    assert {t: s["inserted"] for t, s in check["summary"]["tables"].items()} == {t: 1 for t in SPECS}
    (tmp_path / "xlsx").mkdir()
    book = stage_files([("template.xlsx", template_xlsx())], tmp_path / "xlsx")
    assert run_import(shared_engine, book, tmp_path / "xlsx", "demo-scientist", commit=False)["ok"]


def test_a_viewer_can_check_an_upload_but_not_commit_it(app_ro, ui):
    csv = "compound,program,series,stage\nHF-9003,Heronfield,HF-amide,hit\n"
    at = ui.open(app_ro("demo-viewer"), "load")
    at.file_uploader[0].set_value(("compounds.csv", csv.encode(), "text/csv")).run()
    text = ui.text(at)
    assert "user 'demo-viewer' (viewer) may not import data" in text
    assert "load_commit" not in [b.key for b in at.button]


# ------------------------------------------------------------------ audit integrity
def test_verify_integrity_reports_an_intact_chain(app_ro, ui):
    at = ui.open(app_ro(), "audit")
    at.button(key="audit_verify").click().run()
    assert any("audit chain intact" in s.value for s in at.success)


def test_verify_integrity_names_the_first_edited_event(app, ui, demo_engine):
    from tracker.db.models import APPEND_ONLY_TABLES
    from tracker.db.triggers import drop_append_only

    with demo_engine.begin() as conn:  # tamper as an attacker with file access would: drop the guard, edit a row
        drop_append_only(lambda sql: conn.exec_driver_sql(sql), "sqlite", APPEND_ONLY_TABLES)
        conn.execute(text("UPDATE audit_events SET actor = 'someone-else' WHERE id = 3"))
    at = ui.open(app(), "audit")
    at.button(key="audit_verify").click().run()
    assert any("FAILED" in e.value and "audit event 3" in e.value for e in at.error)


def test_the_audit_filter_narrows_to_one_actor(app_ro, ui):
    at = ui.open(app_ro(), "audit")
    at.selectbox(key="audit_actor").select("demo-lead").run()
    log = at.dataframe[0].value
    assert not log.empty and set(log["Who"]) == {"demo-lead"}


# ------------------------------------------------------------------ what-if
def test_moving_the_residence_time_changes_the_grade_and_writes_nothing(app, graded, ui, demo_engine):
    from tracker.ui import data
    from tracker.ui.views import what_if as w

    before = data.read_version(demo_engine)
    # a compound with a measured residence time and a high grade
    name = next(n for n, g in graded.items()
                if g["grade"] == "high" and any(f["rule"] == "affinity-underestimate" and f["severity"] == "high" for f in g["findings"])
                and data.read_compound(demo_engine, n)["kinetics"]["koff_per_s"].notna().any())
    at = ui.open(app(), "what_if", krt_compound=name)
    slider = at.select_slider(key=f"wi_{name}_rt")
    portfolio, configs, versions, cid = data.read_series_frames(demo_engine, name)
    base = w.stored_scenario(portfolio, cid)
    opts = w.log_options(10.0, 30 * 86400.0, 6, (base.rt_s,))
    fast = w.nearest(opts, 600.0)
    expected = w.grade_scenario(portfolio, configs, versions, cid, dataclasses.replace(base, rt_s=fast), base)
    assert expected["grade"] != "high"  # the scenario really moves the grade
    slider.set_value(fast).run()
    assert not at.exception
    badges = [m.value for m in at.markdown if "border-radius:4px" in m.value]
    assert theme.grade_label("high") in badges[0]  # stored evidence
    assert theme.grade_label(expected["grade"]) in badges[1]  # this what-if
    assert data.read_version(demo_engine) == before


# ------------------------------------------------------------------ identity
def _side(at, ui) -> str:
    return ui.shown(" ".join(m.value for m in at.sidebar.markdown) + " ".join(c.value for c in at.sidebar.caption))


def test_local_mode_signs_in_with_a_password_and_the_role_comes_from_the_users_table(app_ro, ui):
    at = app_ro("demo-scientist")
    assert "demo-scientist** · scientist" in _side(at, ui)
    assert "Signed in as demo-scientist (local mode" in _side(at, ui)
    next(b for b in at.sidebar.button if b.label == "Sign out").click().run()
    assert "Not signed in" in _side(at, ui)


def test_nobody_signed_in_reads_as_a_viewer_and_sees_the_sign_in_form(app_ro, monkeypatch, ui):
    monkeypatch.setenv("KRT_USER", "demo-lead")  # the environment alone never signs anyone in
    at = app_ro(None)
    assert "Not signed in" in _side(at, ui) and "read-only" in _side(at, ui)
    assert [t.key for t in at.sidebar.text_input] == ["krt_signin_name", "krt_signin_password"]
    at = ui.open(at, "gate")
    assert "gate_record" not in [b.key for b in at.button]


@pytest.mark.parametrize("user, password", [("demo-lead", "not-the-demo-password"), ("stranger", "kinetic-demo-2026")])
def test_a_wrong_password_or_an_unknown_name_is_refused_at_sign_in(app_ro, user, password, ui):
    at = app_ro(None)
    at.sidebar.text_input(key="krt_signin_name").input(user)
    at.sidebar.text_input(key="krt_signin_password").input(password)
    next(b for b in at.sidebar.button if b.label == "Sign in").click().run()
    assert [e.value for e in at.sidebar.error] == ["user name or password is wrong"]
    assert "Not signed in" in _side(at, ui)


def test_the_first_user_of_an_empty_database_registers_as_lead_with_a_password(app, tmp_path, ui):
    from argon2 import PasswordHasher
    from sqlalchemy import select

    from tracker.db import migrate, queries
    from tracker.db.models import User
    from tracker.db.session import make_engine

    url = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    engine = make_engine(url)
    migrate.upgrade(engine)
    at = app(None, url=url)
    at.sidebar.text_input(key="krt_bootstrap_name").input("first-person")
    at.sidebar.text_input(key="krt_bootstrap_password").input("first-password-1")
    at.sidebar.text_input(key="krt_bootstrap_password2").input("first-password-1")
    next(b for b in at.sidebar.button if b.label == "Register as lead").click().run()
    assert not at.exception
    users = queries.users(engine)
    assert list(zip(users["name"], users["role"])) == [("first-person", "lead")]
    assert "first-person** · lead" in _side(at, ui)
    with engine.connect() as conn:
        stored = conn.execute(select(User.password_hash)).scalar_one()
    assert stored.startswith("$argon2id$") and "first-password-1" not in stored
    assert PasswordHasher().verify(stored, "first-password-1")
    engine.dispose()


def test_with_sign_in_configured_the_identity_comes_from_st_user(app, demo_engine, ui):
    from tracker.services.users import add_user

    add_user(demo_engine, "ana@example.org", "lead", by="demo-lead")
    auth = {"redirect_uri": "http://localhost:8501/oauth2callback", "cookie_secret": "x" * 32, "client_id": "id",
            "client_secret": "secret", "server_metadata_url": "https://idp.example.org/.well-known/openid-configuration"}
    at = app(None, secrets={"auth": auth}, st_user={"is_logged_in": True, "email": "ana@example.org", "name": "Ana"})
    side = ui.shown(" ".join(m.value for m in at.sidebar.markdown) + " ".join(c.value for c in at.sidebar.caption))
    assert "Signed in as ana@example.org" in side
    assert "Ana** · lead" in side
    assert "local mode" not in side


def test_with_sign_in_configured_nobody_signed_in_sees_a_sign_in_button(app_ro):
    auth = {"redirect_uri": "http://localhost:8501/oauth2callback", "cookie_secret": "x" * 32, "client_id": "id",
            "client_secret": "secret", "server_metadata_url": "https://idp.example.org/.well-known/openid-configuration"}
    at = app_ro(None, secrets={"auth": auth}, st_user={"is_logged_in": False})
    assert "Sign in" in [b.label for b in at.sidebar.button]
    assert "Not signed in" in " ".join(m.value for m in at.sidebar.markdown)


# ------------------------------------------------------------------ paging and sorting
def test_a_large_portfolio_is_shown_a_hundred_rows_per_page(app, tmp_path):
    from tracker.db import migrate
    from tracker.db.session import make_engine
    from tracker.services.importing import import_path

    folder = tmp_path / "csv"
    folder.mkdir()
    (folder / "programs.csv").write_text("program\nBulk\n")
    (folder / "compounds.csv").write_text("compound,program,stage\n" + "".join(f"B-{i:04d},Bulk,hit\n" for i in range(250)))
    url = f"sqlite:///{tmp_path / 'bulk.sqlite'}"
    engine = make_engine(url)
    migrate.upgrade(engine)
    import_path(engine, folder, actor="loader", progress=False)
    engine.dispose()
    at = app(None, url=url)
    assert len(at.dataframe[0].value) == 100
    assert "250 compound(s) match; showing 1–100." in [c.value for c in at.caption]
    at.number_input(key="ov_page").set_value(3).run()
    page3 = at.dataframe[0].value
    assert list(page3["Compound"]) == [f"B-{i:04d}" for i in range(200, 250)]


def test_sorting_by_residence_time_puts_unmeasured_compounds_last():
    import numpy as np
    import pandas as pd

    from tracker.ui.views.overview import filter_sort

    df = pd.DataFrame({"compound": ["a", "b", "c"], "residence_time_s": [np.nan, 60.0, 3600.0], "grade_label": ["x"] * 3})
    assert list(filter_sort(df, [], "Residence time (longest first)")["compound"]) == ["c", "b", "a"]


@pytest.mark.parametrize("view", ["compound", "gate", "what_if"])
def test_a_page_opened_without_a_selection_starts_on_the_worst_graded_compound(app_ro, graded, ui, view):
    at = ui.open(app_ro(), view)
    picked = at.selectbox(key="pick_krt_compound").value
    rank = {"high": 0, "moderate": 1, "low": 2, "clear": 3}
    worst = min(rank[g["grade"]] for g in graded.values())
    assert rank[graded[picked]["grade"]] == worst, (picked, graded[picked]["grade"])


def test_a_page_opened_with_a_selection_keeps_it(app_ro, graded, ui):
    calm = sorted(n for n, g in graded.items() if g["grade"] == "clear")[0]
    at = ui.open(app_ro(), "gate", krt_compound=calm)
    assert at.selectbox(key="pick_krt_compound").value == calm


def _decision_count(engine) -> int:
    with engine.connect() as conn:
        return int(conn.execute(text("SELECT count(*) FROM decisions")).scalar())


def test_the_gate_asks_for_confirmation_showing_the_move_and_the_waivers_before_recording(app, graded, ui, demo_engine):
    from tracker.services.demo import DEMO_PASSWORD

    name, g = _blocked_one_step(graded)
    high = sorted({f["rule"] for f in g["findings"] if f["severity"] == "high"})
    to = STAGES[STAGES.index(g["stage"]) + 1]
    at = choose_next(ui.open(app("demo-lead"), "gate", krt_compound=name), g["stage"])
    # with the blocking findings unwaived the button says the move is blocked
    assert "blocked" in at.button(key="gate_record").label
    for rule in high:
        at.checkbox(key=f"gate_waive_{rule}").check().run()
        at.text_input(key=f"gate_why_{rule}").input(f"accepted: {rule}")
    at.text_area(key="gate_reason").input("review: follow-up agreed")
    at.text_input(key="gate_password").input(DEMO_PASSWORD).run()
    assert at.button(key="gate_record").label == f"Review: advance {name}, {g['stage']} → {to}"
    before = _decision_count(demo_engine)
    at.button(key="gate_record").click().run()
    assert _decision_count(demo_engine) == before  # nothing recorded before the confirmation
    box = " ".join(w.value for w in at.warning)
    assert f"{g['stage']} → {to}" in box and all(rule in box for rule in high)
    assert at.button(key="gate_confirm").label == f"Confirm and sign: {g['stage']} → {to}"
    at.button(key="gate_confirm").click().run()
    assert _decision_count(demo_engine) == before + 1


def test_after_a_decision_the_form_resets_and_a_repeated_submit_records_nothing_more(app, graded, ui, demo_engine):
    from tracker.ui.views.gate import PENDING_KEY

    name, g = _blocked_one_step(graded)
    at = choose_next(ui.open(app("demo-lead"), "gate", krt_compound=name), g["stage"])
    at.text_area(key="gate_reason").input("review without waivers")
    at.text_input(key="gate_password").input(__import__("tracker.services.demo", fromlist=["x"]).DEMO_PASSWORD)
    at.button(key="gate_record").click().run()
    pending = dict(at.session_state[PENDING_KEY])
    at.button(key="gate_confirm").click().run()  # refused (unwaived high finding) and recorded
    assert any("gate refused" in e.value for e in at.error)
    after = _decision_count(demo_engine)
    # the form starts from nothing: no target, hence no reason, waiver, password or confirm button
    assert at.selectbox(key="gate_to").value is None
    assert "gate_record" not in [b.key for b in at.button] and "gate_confirm" not in [b.key for b in at.button]
    # the same request submitted again (a double click reaching the server twice) writes nothing more
    at.session_state[PENDING_KEY] = pending
    at.selectbox(key="gate_to").set_value(pending["to"]).run()
    at.button(key="gate_confirm").click().run()
    assert _decision_count(demo_engine) == after
    assert any("already recorded" in s.value for s in at.success)
