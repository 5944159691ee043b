"""Dashboard sign-in and signed gate decisions (AppTest on a private demo copy).

The gate page asks for the password again to sign (21 CFR Part 11 §11.200(a)(1)); a wrong one records
nothing; waivers on the candidate -> clinical move need a second lead (two-person rule); the signature
(printed name, UTC time, meaning) shows on the gate page, the audit page and in the review pack.
"""

from __future__ import annotations

import pytest

from tracker.domain import STAGES
from tracker.services.demo import DEMO_PASSWORD


def _blocked(graded, to_last: bool = False):
    """A compound blocked by a high finding: one step before clinical when ``to_last``, else any forward step."""
    for name, g in graded.items():
        if g["stage"] == STAGES[-1] or not any(f["severity"] == "high" for f in g["findings"]):
            continue
        if to_last == (g["stage"] == STAGES[-2]):
            return name, g
    pytest.skip("the demo has no such compound")


def _fill(at, waive: list[str], password: str, second: tuple[str, str] | None = None):
    for rule in waive:
        at.checkbox(key=f"gate_waive_{rule}").check().run()
        at.text_input(key=f"gate_why_{rule}").input(f"accepted at review: {rule}")
    at.text_area(key="gate_reason").input("portfolio review")
    at.text_input(key="gate_password").input(password)
    if second:
        at.text_input(key="gate_second_lead").input(second[0])
        at.text_input(key="gate_second_password").input(second[1])
    at.button(key="gate_record").click().run()
    assert not at.exception, [e.value for e in at.exception]
    if "gate_confirm" in [b.key for b in at.button]:  # the confirmation step
        at.button(key="gate_confirm").click().run()
        assert not at.exception, [e.value for e in at.exception]
    return at


def _counts(engine):
    from sqlalchemy import text

    with engine.connect() as conn:
        return tuple(conn.execute(text(f"SELECT count(*) FROM {t}")).scalar() for t in ("decisions", "signatures", "audit_events"))


def test_the_gate_page_has_a_password_field_and_a_wrong_password_records_nothing(app, demo_graded, ui, demo_engine):
    name, g = _blocked(demo_graded)
    high = sorted({f["rule"] for f in g["findings"] if f["severity"] == "high"})
    at = ui.open(app("demo-lead"), "gate", krt_compound=name)
    at.selectbox(key="gate_to").set_value(STAGES[STAGES.index(g["stage"]) + 1]).run()
    assert at.text_input(key="gate_password").proto.type == at.text_input(key="gate_password").proto.PASSWORD
    before = _counts(demo_engine)
    _fill(at, high, "not-the-password")
    assert any("user name or password is wrong" in ui.shown(e.value) for e in at.error)
    assert _counts(demo_engine) == before
    assert at.text_input(key="gate_password").value == ""  # the attempted signature is not kept


def test_a_signed_approval_shows_the_signature_on_the_gate_audit_and_review_pack(app, demo_graded, ui, demo_engine):
    from tracker.ui.review_pack import build_pack

    name, g = _blocked(demo_graded)
    high = sorted({f["rule"] for f in g["findings"] if f["severity"] == "high"})
    at = ui.open(app("demo-lead"), "gate", krt_compound=name)
    at.selectbox(key="gate_to").set_value(STAGES[STAGES.index(g["stage"]) + 1]).run()
    _fill(at, high, DEMO_PASSWORD)
    ok = [ui.shown(s.value) for s in at.success]
    assert ok and "Signed: Demo Lead (demo-lead), " in ok[0] and "UTC: approved, as lead" in ok[0], ok
    table = at.dataframe[-1].value
    signed = table["Signed (printed name, UTC time: meaning)"].iloc[0]
    assert "approved, as lead" in signed and "waived, as lead" in signed

    at = ui.open(at, "audit")
    assert "sign" in set(at.dataframe[0].value["Action"].head(10))

    pack = build_pack(demo_engine, compounds=[name], with_charts=False)
    assert "Signed gate decisions" in pack and "Demo Lead (demo-lead)" in pack and "approved, as lead" in pack


def test_a_waiver_into_clinical_needs_the_second_leads_signature_on_the_page(app, demo_graded, ui, demo_engine):
    from tracker.db import queries
    from tracker.services.users import add_user

    name, g = _blocked(demo_graded, to_last=True)
    high = sorted({f["rule"] for f in g["findings"] if f["severity"] == "high"})
    at = ui.open(app("demo-lead"), "gate", krt_compound=name)
    at.selectbox(key="gate_to").set_value(STAGES[-1]).run()
    _fill(at, high, DEMO_PASSWORD)
    assert any("two-person rule" in ui.shown(e.value) for e in at.error)
    assert queries.compounds(demo_engine).set_index("name").loc[name, "stage"] == g["stage"]

    add_user(demo_engine, "second-lead", "lead", by="demo-lead", password="second-password-1", full_name="Sec Ond")
    at.selectbox(key="gate_to").set_value(STAGES[-1]).run()  # the form was reset by the refusal
    _fill(at, high, DEMO_PASSWORD, second=("second-lead", "second-password-1"))
    assert at.success, [e.value for e in at.error]
    assert queries.compounds(demo_engine).set_index("name").loc[name, "stage"] == STAGES[-1]
    sigs = queries.signatures(demo_engine, compounds=[name])
    assert list(sigs["meaning"])[-3:] == ["approved", "waived", "co-signed"]
    assert list(sigs["printed_name"])[-1] == "Sec Ond"


def test_a_viewer_signed_in_sees_no_gate_controls(app, demo_graded, ui):
    name, _ = _blocked(demo_graded)
    at = ui.open(app("demo-viewer"), "gate", krt_compound=name)
    assert "gate_password" not in [t.key for t in at.text_input]
    assert "gate_record" not in [b.key for b in at.button]


def test_the_demo_dashboard_signs_in_as_the_demo_lead_with_the_demo_password(app, monkeypatch, ui):
    from tracker.services.demo import DEMO_LEAD, ENV_DEMO_SIGNIN_PASSWORD, ENV_DEMO_SIGNIN_USER

    monkeypatch.setenv(ENV_DEMO_SIGNIN_USER, DEMO_LEAD)
    monkeypatch.setenv(ENV_DEMO_SIGNIN_PASSWORD, DEMO_PASSWORD)
    at = app(None)
    side = ui.shown(" ".join(m.value for m in at.sidebar.markdown) + " ".join(c.value for c in at.sidebar.caption))
    assert "demo-lead** · lead" in side
    monkeypatch.setenv(ENV_DEMO_SIGNIN_PASSWORD, "wrong-demo-password")
    at = app(None)
    side = " ".join(m.value for m in at.sidebar.markdown)
    assert "Not signed in" in side  # the password is checked like any other sign-in
