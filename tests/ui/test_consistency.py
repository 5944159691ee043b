"""Every front end shows the grader's numbers: one evidence model, no second copy.

For a sample of demo compounds with measured kinetics, the fold of the worst reading and the residence time are
read from ``krt grade --json``, from the finding text, from the risk overview (AppTest) and from the compound page
(AppTest); all must agree to the three significant figures the tracker displays.  The reference outside the
dashboard is the grading service's JSON (itself checked against ODE and root-finding references in tests/rules).
"""

from __future__ import annotations

import json

import pytest

from tracker import fmt

SAMPLE = ("HF-1010", "HF-1012", "QM-2013", "TM-3003")  # enzyme vs RT 31 h; replicate runs; too potent; enzyme 6x


@pytest.fixture(scope="module")
def cli_json(shared_demo_url):
    import io
    from contextlib import redirect_stdout

    from tracker.cli import main

    buf = io.StringIO()
    with redirect_stdout(buf):
        assert main(["--database", shared_demo_url, "grade", "--json"]) == 0
    return {r["compound"]: r for r in json.loads(buf.getvalue())}


def _worst_finding(entry):
    rows = [f for f in entry["findings"] if "fold_shift" in f]
    return max(rows, key=lambda f: abs(__import__("math").log(f["fold_shift"])))


@pytest.mark.parametrize("name", SAMPLE)
def test_the_overview_the_compound_page_the_cli_and_the_finding_show_the_same_fold_and_residence_time(name, cli_json, app_ro, ui):
    f = _worst_finding(cli_json[name])
    fold, rt = f["fold_shift"], f["residence_time_s"]
    fold_text, rt_text = fmt.fold(fold), fmt.duration(rt)
    # the finding's own text
    assert rt_text in f["message"]
    assert (fold_text if fold >= 1 else fmt.fold(1 / fold)) in f["message"]
    # the risk overview: the worst reading's fold and the grader's residence time, and it names the reading
    at = app_ro()
    table = at.dataframe[0].value.set_index("Compound")
    assert table.loc[name, "Worst fold"].startswith(fold_text + " (")
    assert table.loc[name, "RT"] == rt_text
    assert f["assay"] in table.loc[name, "Worst fold"]  # and it names the reading
    # the compound page: the worst-reading line, the kinetics caption and the potency table
    at = ui.open(app_ro(), "compound", krt_compound=name)
    text = ui.text(at)
    assert f"predicted to read {fold_text}" in text
    assert f"residence time {rt_text}" in text
    potency = at.dataframe[0].value
    assert fold_text in set(potency["fold"])  # the "Fold shift" column, shown as text in the one format


def test_a_program_without_an_engagement_threshold_shows_the_tiles_with_the_rules_default(app, ui, demo_engine):
    # a program that sets time limits but no threshold crashed the compound page; the tiles now use the same
    # default as the duration check (tracker.rules.config default_engagement_threshold) and say so
    from sqlalchemy import update

    from tracker.db.models import Program
    from tracker.db.uow import UnitOfWork

    with UnitOfWork(demo_engine) as uow:
        uow.session.execute(update(Program).where(Program.name == "Quillmere").values(engagement_threshold=None))
        uow.commit()
    at = ui.open(app(), "compound", krt_compound="QM-2010")
    text = ui.text(at)
    assert "Onset (threshold reached)" in text
    assert "threshold 50% (rules default; the program sets none)" in text
