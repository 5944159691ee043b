"""The "Fit a time course" page under AppTest: upload (long and plate layouts), units, fit overlay, guarded save.

The page must show what the services return: the numbers are compared with
tracker.services.fits.fit_time_course on the same file, never recomputed here.
Time courses: the demo's own files (seed_demo/timecourses, simulated from
the closed forms of seed_demo/build_demo.py) and a plate written here from
the one-site dissociation B(t) = B0·exp(-koff·t) + NSB (Copeland, Pompliano &
Meek 2006, Nat Rev Drug Discov 5:730).
"""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy import select

from tracker.db.models import Compound, KineticMeasurement
from tracker.db.uow import UnitOfWork

from .conftest import REPO

DEMO_TC = REPO / "seed_demo" / "timecourses"


def upload(at, name, content: bytes, index=0):
    at.file_uploader[index].set_value((name, content, "text/csv")).run()
    assert not at.exception, [e.value for e in at.exception]
    return at


def service_fit(path, method="dissociation", **kw):
    from tracker.io.timecourse import read_time_course
    from tracker.services.fits import fit_time_course

    df = read_time_course(path, method, **kw)
    return fit_time_course(method, df)


def test_the_page_is_registered_and_asks_for_a_file(app_ro, ui):
    at = ui.open(app_ro("demo-scientist"), "fit")
    assert at.title[0].value == "Fit a time course"
    assert "Upload a time course" in ui.text(at)
    assert "not dosing advice" in ui.text(at).lower() or "dosing" in ui.text(at).lower()


def test_an_upload_is_fitted_and_shown_with_the_service_numbers_overlay_and_residuals(app_ro, ui):
    from tracker.fmt import duration

    path = DEMO_TC / "QM-2007_dissociation.csv"
    at = upload(ui.open(app_ro("demo-scientist"), "fit"), path.name, path.read_bytes())
    text = ui.text(at)
    truth = service_fit(path)
    assert f"Residence time**: {duration(truth.estimates['residence_time'])}" in text
    assert "95% CI" in text and "Weights: none" in text
    assert ui.charts(at) == 2  # the fit with its band, and the residuals


def test_weights_chosen_on_the_page_reach_the_fit(app_ro, ui):
    path = DEMO_TC / "QM-2007_dissociation.csv"
    at = upload(ui.open(app_ro("demo-scientist"), "fit"), path.name, path.read_bytes())
    at.selectbox(key="fit_weights").set_value("proportional").run()
    assert "Weights: proportional" in ui.text(at)


@pytest.mark.parametrize("content,expected", [
    (b"time (min);signal\n0;1\n1;2\n", "bad.csv:1: the file uses ';' between fields; save it comma-separated"),
    (b"time,signal\n0,10\n1,8\n2,6\n3,5\n4,4\n5,3.5\n", "bad.csv:1: time: a unit is needed"),
    (b"time (min),signal\n" + b"".join(f"{t},{100 * (1 - np.exp(-t / 10)):.3f}\n".encode() for t in range(0, 60, 3)),
     "bad.csv: dissociation: the signal rises"),
])
def test_bad_uploads_get_one_located_line(app_ro, ui, content, expected):
    at = upload(ui.open(app_ro("demo-scientist"), "fit"), "bad.csv", content)
    assert len(at.error) == 1 and expected in ui.shown(at.error[0].value)
    assert ui.charts(at) == 0


def test_a_unit_chosen_on_the_page_fills_a_header_without_one(app_ro, ui):
    path = DEMO_TC / "QM-2007_dissociation.csv"
    bare = path.read_text().replace("time (min)", "time", 1).encode()
    at = upload(ui.open(app_ro("demo-scientist"), "fit"), "bare.csv", bare)
    assert "a unit is needed" in ui.shown(at.error[0].value)
    at.selectbox(key="fit_time_unit").set_value("min").run()
    assert not at.error and ui.charts(at) == 2


def plate_csv(tmp_path):
    rng = np.random.default_rng(9)
    t = np.linspace(0, 24 * 60, 25)  # min
    cols = {w: 1000 * np.exp(-t * 60 / 7200) * g + 40 + rng.normal(0, 8, t.size)  # Copeland et al. 2006, RT 2 h
            for w, g in (("A1", 1.0), ("A2", 0.8), ("A3", 1.2))}
    text = "time (min)," + ",".join(cols) + "\n" + "".join(
        f"{t[i]:g}," + ",".join(f"{cols[w][i]:.2f}" for w in cols) + "\n" for i in range(t.size))
    return text.encode()


def test_a_plate_upload_with_a_well_map_is_fitted_jointly(app_ro, ui, tmp_path):
    content = plate_csv(tmp_path)
    at = upload(ui.open(app_ro("demo-scientist"), "fit"), "plate.csv", content)
    at.radio(key="fit_layout").set_value("Plate: a time column and one column per well").run()
    editor = at.get("arrow_data_frame") or at.get("data_editor")
    assert editor  # the well map editor, one row per well of the upload
    map_csv = b"well,concentration,curve\nA1,,cpd\nA2,,cpd\nA3,,cpd\n"
    upload(at, "map.csv", map_csv, index=1)
    assert not at.error, [e.value for e in at.error]
    text = ui.text(at)
    assert "63 points" not in text and "75 points" in text  # three wells, 25 readings each
    assert "Residence time" in text and ui.charts(at) == 2


def km_of(engine, name):
    with UnitOfWork(engine, write=False) as uow:
        cid = uow.session.execute(select(Compound.id).where(Compound.name == name)).scalar_one()
        return uow.session.execute(select(KineticMeasurement.id, KineticMeasurement.superseded_by_id,
                                          KineticMeasurement.superseded_reason)
                                   .where(KineticMeasurement.compound_id == cid).order_by(KineticMeasurement.id)).all()


def test_saving_uses_the_service_guard_and_a_supersede_reason(app, ui, demo_engine):
    path = DEMO_TC / "QM-2007_dissociation.csv"
    slip = path.read_text().replace("time (min)", "time (s)", 1).encode()  # minutes read as seconds
    before = km_of(demo_engine, "QM-2007")
    assert len(before) == 1
    at = upload(ui.open(app("demo-scientist"), "fit"), "slip.csv", slip)
    at.selectbox(key="fit_save_compound").set_value("QM-2007").run()
    at.button(key="fit_save").click().run()
    assert "QM-2007 already has a residence time" in ui.shown(at.error[0].value)
    assert km_of(demo_engine, "QM-2007") == before  # nothing written
    at.text_input(key="fit_supersede").input("plate reader clock exported seconds; re-read").run()
    at.button(key="fit_save").click().run()
    assert not at.error, [e.value for e in at.error]
    assert "saved for QM-2007: residence time" in ui.shown(at.success[0].value) and "superseded for QM-2007" in ui.shown(at.success[0].value)
    after = km_of(demo_engine, "QM-2007")
    assert len(after) == 2 and after[0].superseded_by_id == after[1].id
    assert after[0].superseded_reason == "plate reader clock exported seconds; re-read"
    # the evidence page keeps the older value on record and says it was superseded, and why
    at = ui.open(at, "compound", krt_compound="QM-2007")
    status = [df for df in (d.value for d in at.dataframe) if "Status" in df.columns][0]["Status"].tolist()
    assert sorted(status) == ["current", f"superseded by #{after[1].id}: plate reader clock exported seconds; re-read"]


def test_a_viewer_can_fit_but_not_save(app_ro, ui):
    path = DEMO_TC / "QM-2007_dissociation.csv"
    at = upload(ui.open(app_ro("demo-viewer"), "fit"), path.name, path.read_bytes())
    assert ui.charts(at) == 2
    assert "fit_save" not in [b.key for b in at.button]
    assert "Viewers can fit but not save" in ui.text(at)
