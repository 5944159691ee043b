"""A small invented portfolio built so that each rule fires or stays silent, loaded through the real importer.

Expected grades (why: see the comments in ``FILES``):

==========  =================  ========  ===================================================
compound    stage              grade     why
==========  =================  ========  ===================================================
K-ADV-1     advanced-lead      high      no kinetic measurement
K-ADV-2     advanced-lead      clear     fast binder (RT 2 min) read after 1 h
K-LO-1      lead-optimization  moderate  Ki shift 10x between 30 min and 16 h, RT unmeasured
K-HIT-1     hit                clear     a hit far from the assay floor
K-CAN-1     candidate          high      RT 6 h: engagement outlasts the 8 h offset limit
E-LO-1      lead-optimization  moderate  enzyme IC50 after 15 min with RT 2 h (~5x shift)
==========  =================  ========  ===================================================
"""

from __future__ import annotations

import pytest

FILES = {
    "programs.csv": (
        "program,target,intended_profile,engagement_threshold,onset_max,duration_min,offset_max,dosing_interval\n"
        "Kestrel,Receptor KS1 (invented),short-acting,30 %,,,8 h,\n"
        "Egret,Protease EG2 (invented),twice-daily,50 %,,,,\n"
    ),
    "compounds.csv": (
        "compound,program,series,stage,smiles\n"
        "K-ADV-1,Kestrel,A,advanced-lead,\n"
        "K-ADV-2,Kestrel,A,advanced-lead,\n"
        "K-LO-1,Kestrel,A,lead-optimization,\n"
        "K-HIT-1,Kestrel,B,hit,\n"
        "K-CAN-1,Kestrel,A,candidate,\n"
        "E-LO-1,Egret,E,lead-optimization,\n"
    ),
    "potency.csv": (
        "compound,assay,readout,value,incubation,format,tracer_conc,tracer_kd,tracer_residence_time,max_response_fraction,date,source\n"
        "K-ADV-1,KS bind,KD,40 nM,1 h,binding,,,,,,\n"
        "K-ADV-2,KS bind,KD,5 nM,1 h,binding,,,,,,\n"
        "K-LO-1,KS bind,KD,2 nM,30 min,binding,,,,,,\n"  # 10x weaker at 30 min than at 16 h: a Ki shift
        "K-LO-1,KS bind,KD,200 pM,16 h,binding,,,,,,\n"
        "K-HIT-1,KS bind,KD,300 nM,1 h,binding,,,,,,\n"
        "K-CAN-1,KS bind,KD,1 nM,24 h,binding,,,,,,\n"  # 24 h = 4 x RT: read at equilibrium
        "E-LO-1,EG activity,IC50,5 nM,15 min,enzyme,,,,,,\n"  # 15 min = 0.125 x RT
    ),
    "kinetics.csv": (
        "compound,method,kon,koff,residence_time,kd,kon_low,kon_high,koff_low,koff_high,date,source\n"
        "K-ADV-2,spr,2e6 /M/s,,2 min,,,,,,2026-01-10,\n"
        "K-CAN-1,spr,1.667e5 /M/s,,6 h,,,,,,2026-01-12,\n"  # KD = 1/(kon RT) = 0.28 nM
        "E-LO-1,jump-dilution,,,2 h,,,,,,2026-01-15,\n"
    ),
    "pk.csv": (
        "compound,species,route,half_life,free_cmax,tmax,dosing_interval,source\n"
        "K-CAN-1,rat,oral,2 h,20 nM,30 min,,\n"
    ),
}

EXPECTED_GRADES = {
    "K-ADV-1": "high",
    "K-ADV-2": "clear",
    "K-LO-1": "moderate",
    "K-HIT-1": "clear",
    "K-CAN-1": "high",
    "E-LO-1": "moderate",
}

USERS = (("lena", "lead"), ("sam", "scientist"), ("vic", "viewer"), ("otto", "lead"))


@pytest.fixture
def portfolio_dir(tmp_path):
    folder = tmp_path / "kestrel"
    folder.mkdir()
    for name, text in FILES.items():
        (folder / name).write_text(text, encoding="utf-8")
    return folder


@pytest.fixture
def kestrel(migrated_engine, portfolio_dir):
    """A migrated database (SQLite file and PostgreSQL) with users and the portfolio imported by the lead."""
    from tracker.services.importing import import_path
    from tracker.services.users import add_user

    for name, role in USERS:
        add_user(migrated_engine, name, role, by=None if name == "lena" else "lena")
    import_path(migrated_engine, portfolio_dir, actor="lena")
    return migrated_engine


@pytest.fixture
def expected_grades():
    return dict(EXPECTED_GRADES)


@pytest.fixture
def cli(kestrel, capsys, monkeypatch):
    """Run ``krt`` on the kestrel database: returns (exit code, stdout, stderr)."""
    from tracker.cli import main

    url = kestrel.url.render_as_string(hide_password=False)
    monkeypatch.setenv("KRT_DATABASE_URL", url)  # restored afterwards (main() sets it from --database)

    def run(*argv):
        code = main(["--database", url, *argv])
        out, err = capsys.readouterr()
        return code, out, err

    return run
