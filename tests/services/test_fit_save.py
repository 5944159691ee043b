"""Saving fits is guarded: roles, the 3x residence-time check, supersession with an audited reason.

Runs on a real SQLite file and a real PostgreSQL database (the ``kestrel``
portfolio of conftest.py: K-CAN-1 has a stored residence time of 6 h from SPR).
The time courses are simulated from the one-site dissociation
B(t) = B0·exp(-koff·t) + NSB with seeded noise (Copeland, Pompliano & Meek 2006,
Nat Rev Drug Discov 5:730; residence time = 1/koff).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sqlalchemy import func, select, update

from tracker.db.models import AuditEvent, KineticMeasurement, TimeCourse
from tracker.db.uow import UnitOfWork

RT_6H = 6 * 3600.0


def dissociation_file(tmp_path, name="diss.csv", rt_s=RT_6H, header_unit="min", seed=1):
    """Readings every hour for a day, times written in minutes; ``header_unit`` may be a slip."""
    rng = np.random.default_rng(seed)
    t_min = np.linspace(0, 24 * 60, 25)
    y = 1000.0 * np.exp(-t_min * 60 / rt_s) + 50.0 + rng.normal(0, 8, t_min.size)  # Copeland et al. 2006
    path = tmp_path / name
    path.write_text(f"time ({header_unit}),signal\n" + "".join(f"{a:g},{b:.2f}\n" for a, b in zip(t_min, y)))
    return str(path)


def counts(engine):
    with UnitOfWork(engine, write=False) as uow:
        s = uow.session
        return tuple(s.execute(select(func.count()).select_from(m)).scalar_one() for m in (TimeCourse, KineticMeasurement, AuditEvent))


def km_rows(engine, compound_id_of):
    with UnitOfWork(engine, write=False) as uow:
        return uow.session.execute(select(KineticMeasurement.id, KineticMeasurement.koff_per_s, KineticMeasurement.superseded_by_id,
                                          KineticMeasurement.superseded_reason, KineticMeasurement.superseded_at)
                                   .where(KineticMeasurement.compound_id == compound_id_of).order_by(KineticMeasurement.id)).all()


def compound_id(engine, name):
    from tracker.db.models import Compound

    with UnitOfWork(engine, write=False) as uow:
        return uow.session.execute(select(Compound.id).where(Compound.name == name)).scalar_one()


def test_a_save_prints_what_it_stored_in_units(cli, tmp_path):
    code, out, err = cli("fit", "dissociation", dissociation_file(tmp_path), "--save", "K-HIT-1", "--by", "sam", as_user="sam")
    assert code == 0, err
    line = [ln for ln in out.splitlines() if "saved for K-HIT-1" in ln]
    assert len(line) == 1
    assert "residence time 6" in line[0] and " h" in line[0] and "/s" in line[0] and "kinetic measurement" in line[0]
    assert "True" not in out and "created" not in out and "_id" not in out


def test_a_unit_slip_is_refused_and_nothing_is_written(cli, kestrel, tmp_path):
    before = counts(kestrel)
    slip = dissociation_file(tmp_path, header_unit="s")  # minutes read as seconds: RT 60x too short
    code, out, err = cli("fit", "dissociation", slip, "--save", "K-CAN-1", "--by", "sam", as_user="sam")
    assert code != 0 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert "K-CAN-1 already has a residence time of 6 h" in lines[0]
    assert "shorter" in lines[0] and "--supersede" in lines[0]
    assert counts(kestrel) == before


def test_a_value_within_3x_is_stored_beside_the_old_one(cli, kestrel, tmp_path):
    cid = compound_id(kestrel, "K-CAN-1")
    code, _out, err = cli("fit", "dissociation", dissociation_file(tmp_path, rt_s=2 * RT_6H), "--save", "K-CAN-1", "--by", "sam", as_user="sam")
    assert code == 0, err
    rows = km_rows(kestrel, cid)
    assert len(rows) == 2 and all(r.superseded_by_id is None for r in rows)


def test_supersede_keeps_the_old_value_on_record_audits_the_reason_and_regrades(cli, kestrel, tmp_path):
    from tracker.services.grading import load_portfolio

    cid = compound_id(kestrel, "K-CAN-1")
    (old_id, old_koff, *_), = km_rows(kestrel, cid)
    slip = dissociation_file(tmp_path, header_unit="s")
    reason = "re-measured: the SPR run used the wrong regeneration buffer"
    code, out, err = cli("fit", "dissociation", slip, "--save", "K-CAN-1", "--by", "sam", "--supersede", reason, "--json", as_user="sam")
    assert code == 0, err
    saved = json.loads(out)["saved"]
    assert saved["created"] and saved["superseded"] == [{"id": old_id, "residence_time_s": pytest.approx(1 / old_koff)}]
    assert saved["stored"]["residence_time_s"] == pytest.approx(RT_6H / 60, rel=0.1)  # the slip, stored on purpose
    rows = km_rows(kestrel, cid)
    assert [r.id for r in rows][0] == old_id and rows[0].koff_per_s == old_koff  # kept, not deleted or edited
    assert rows[0].superseded_by_id == saved["kinetic_measurement_id"] and rows[0].superseded_reason == reason
    assert rows[0].superseded_at is not None and rows[1].superseded_by_id is None
    with UnitOfWork(kestrel, write=False) as uow:
        ev = uow.session.execute(select(AuditEvent.entity_id, AuditEvent.reason, AuditEvent.actor)
                                 .where(AuditEvent.action == "supersede")).all()
    assert len(ev) == 1 and ev[0].entity_id == str(old_id) and ev[0].reason == reason and ev[0].actor == "sam"
    graded = load_portfolio(kestrel).kinetics
    assert old_id not in set(graded["id"]) and saved["kinetic_measurement_id"] in set(graded["id"])
    code, out, err = cli("audit", "verify")
    assert code == 0, err
    with kestrel.begin() as conn:  # un-superseding by hand brings the old value back into the grade: verify names it
        conn.execute(update(KineticMeasurement).where(KineticMeasurement.id == old_id).values(superseded_by_id=None))
    code, out, err = cli("audit", "verify")
    assert code == 1 and f"kinetic_measurements row {old_id}: superseded_by_id is None" in err, err


def test_the_text_report_names_what_was_superseded(cli, tmp_path):
    code, out, err = cli("fit", "dissociation", dissociation_file(tmp_path, header_unit="s"), "--save", "K-CAN-1",
                         "--by", "lena", "--supersede", "clock fixed", as_user="lena")
    assert code == 0, err
    assert "superseded for K-CAN-1: kinetic measurement" in out and "residence time 6 h" in out


@pytest.mark.parametrize("argv,fragment", [
    (["--by", "vic"], "user 'vic' is a viewer; only a scientist or lead may save fits"),
    (["--by", "nobody"], "--by 'nobody' does not match the signed-in user 'sam'"),
    (["--by", "sam", "--supersede", "  "], "--supersede needs a reason"),
])
def test_saving_needs_a_scientist_or_lead_and_a_real_reason(cli, kestrel, tmp_path, argv, fragment):
    before = counts(kestrel)
    signed_in = "vic" if argv[1] == "vic" else "sam"
    code, out, err = cli("fit", "dissociation", dissociation_file(tmp_path), "--save", "K-HIT-1", *argv, as_user=signed_in)
    assert code != 0
    lines = err.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0]
    assert counts(kestrel) == before


def test_saving_the_same_data_twice_adds_nothing_and_says_so(cli, kestrel, tmp_path):
    f = dissociation_file(tmp_path)
    assert cli("fit", "dissociation", f, "--save", "K-HIT-1", "--by", "sam", as_user="sam")[0] == 0
    before = counts(kestrel)
    code, out, err = cli("fit", "dissociation", f, "--save", "K-HIT-1", "--by", "sam", as_user="sam")
    assert code == 0, err
    assert "already stored for K-HIT-1" in out and counts(kestrel) == before


def test_the_service_guard_is_the_same_without_the_cli(kestrel, tmp_path):
    """The dashboard calls save_fit directly: the same refusal, the same supersession."""
    from tracker.io.timecourse import read_time_course
    from tracker.services.fits import ResidenceTimeConflict, fit_time_course, save_fit

    df = read_time_course(dissociation_file(tmp_path, header_unit="s"), "dissociation")
    result = fit_time_course("dissociation", df)
    with pytest.raises(ResidenceTimeConflict, match="K-CAN-1 already has a residence time"):
        save_fit("K-CAN-1", result, df, "upload.csv", engine=kestrel, actor="sam")
    out = save_fit("K-CAN-1", result, df, "upload.csv", engine=kestrel, actor="lena", supersede="checked with the bench notes")
    assert out["created"] and len(out["superseded"]) == 1


def test_an_export_leaves_out_superseded_values_so_a_re_import_cannot_revive_them(cli, kestrel, tmp_path):
    from tracker.db import queries

    code, _out, err = cli("fit", "dissociation", dissociation_file(tmp_path, header_unit="s"), "--save", "K-CAN-1",
                          "--by", "sam", "--supersede", "clock fixed", as_user="sam")
    assert code == 0, err
    code, _out, err = cli("export", str(tmp_path / "out"))
    assert code == 0, err
    rows = (tmp_path / "out" / "kinetics.csv").read_text().splitlines()
    can = [r for r in rows if r.startswith("K-CAN-1,")]
    assert len(can) == 1 and ",6 h," not in can[0]  # only the current (superseding) value
    latest = queries.kinetics(kestrel, latest=True, compounds=["K-CAN-1"])
    assert len(latest) == 1 and latest["superseded_by_id"].isna().all()
    assert len(queries.kinetics(kestrel, compounds=["K-CAN-1"])) == 2  # the older value stays on record
