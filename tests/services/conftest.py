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
P-LO-1      lead-optimization  moderate  two jump-dilution runs 6x apart: conflicting kinetics
P-HTL-1     hit-to-lead        low       IC50 1.5 nM with 2 nM enzyme: within 2x of [E]/2 (tight binding)
P-HIT-1     hit                low       3x shift between 30 min and 3 h: beyond scatter, below a fixed 6x
==========  =================  ========  ===================================================
"""

from __future__ import annotations

import pytest

FILES = {
    "programs.csv": (
        "program,target,intended_profile,engagement_threshold,onset_max,duration_min,offset_max,dosing_interval\n"
        "Kestrel,Receptor KS1 (invented),short-acting,30 %,,,8 h,\n"
        "Egret,Protease EG2 (invented),twice-daily,50 %,,,,\n"
        "Plover,Enzyme PL4 (invented),,,,,,\n"
    ),
    "compounds.csv": (
        "compound,program,series,stage,smiles\n"
        "K-ADV-1,Kestrel,A,advanced-lead,\n"
        "K-ADV-2,Kestrel,A,advanced-lead,\n"
        "K-LO-1,Kestrel,A,lead-optimization,\n"
        "K-HIT-1,Kestrel,B,hit,\n"
        "K-CAN-1,Kestrel,A,candidate,\n"
        "E-LO-1,Egret,E,lead-optimization,\n"
        "P-LO-1,Plover,P,lead-optimization,\n"
        "P-HTL-1,Plover,P,hit-to-lead,\n"
        "P-HIT-1,Plover,P,hit,\n"
    ),
    "potency.csv": (
        "compound,assay,readout,value,incubation,format,tracer_conc,tracer_kd,tracer_residence_time,max_response_fraction,date,source,preincubation,max_incubation,target_conc\n"
        "K-ADV-1,KS bind,KD,40 nM,1 h,binding,,,,,,,,,\n"
        "K-ADV-2,KS bind,KD,5 nM,1 h,binding,,,,,,,,,\n"
        "K-LO-1,KS bind,KD,2 nM,30 min,binding,,,,,,,,,\n"  # 10x weaker at 30 min than at 16 h: a Ki shift
        "K-LO-1,KS bind,KD,200 pM,16 h,binding,,,,,,,,,\n"
        "K-HIT-1,KS bind,KD,300 nM,1 h,binding,,,,,,,,,\n"
        "K-CAN-1,KS bind,KD,1 nM,24 h,binding,,,,,,,,,\n"  # 24 h = 4 x RT: read at equilibrium
        "E-LO-1,EG activity,IC50,5 nM,15 min,enzyme,,,,,,,,,\n"  # 15 min = 0.125 x RT
        "P-LO-1,PL activity,IC50,50 nM,24 h,enzyme,,,,,,,,,\n"  # 24 h = 4 x the longer RT: read at equilibrium either way
        "P-HTL-1,PL activity,IC50,1.5 nM,1 h,enzyme,,,,,,,,,2 nM\n"  # [E]/2 = 1 nM: the IC50 reports the enzyme
        "P-HIT-1,PL activity,IC50,15 nM,30 min,enzyme,,,,,,,,,\n"  # 3x weaker at 30 min than at 3 h: at most 6x possible
        "P-HIT-1,PL activity,IC50,5 nM,3 h,enzyme,,,,,,,,,\n"
    ),
    "kinetics.csv": (
        "compound,method,kon,koff,residence_time,kd,kon_low,kon_high,koff_low,koff_high,date,source\n"
        "K-ADV-2,spr,2e6 /M/s,,2 min,,,,,,2026-01-10,\n"
        "K-CAN-1,spr,1.667e5 /M/s,,6 h,,,,,,2026-01-12,\n"  # KD = 1/(kon RT) = 0.28 nM
        "E-LO-1,jump-dilution,,,2 h,,,,,,2026-01-15,\n"
        "P-LO-1,jump-dilution,,,1 h,,,,,,2026-01-20,\n"  # two runs 6x apart: the grade uses 6 h until resolved
        "P-LO-1,jump-dilution,,,6 h,,,,,,2026-02-20,\n"
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
    "P-LO-1": "moderate",
    "P-HTL-1": "low",
    "P-HIT-1": "low",
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
def kestrel(migrated_engine, portfolio_dir, test_password):
    """A migrated database (SQLite file and PostgreSQL) with users and the portfolio imported by the lead."""
    from tracker.services.importing import import_path
    from tracker.services.users import add_user

    for name, role in USERS:
        add_user(migrated_engine, name, role, by=None if name == "lena" else "lena", password=test_password)
    import_path(migrated_engine, portfolio_dir, actor="lena")
    return migrated_engine


@pytest.fixture
def expected_grades():
    return dict(EXPECTED_GRADES)


@pytest.fixture
def cli(kestrel, capsys, monkeypatch, login, test_password):
    """Run ``krt`` on the kestrel database: returns (exit code, stdout, stderr).

    ``stdin="..."`` feeds standard input; ``as_user="lena"`` signs in first with ``krt login`` (the test
    password) and keeps that session for later calls; ``signed=N`` adds ``--password-stdin`` with N lines
    of the test password on stdin (a gate's signature, and a second lead's)."""
    import io
    import sys

    from tracker.cli import main

    url = kestrel.url.render_as_string(hide_password=False)
    monkeypatch.setenv("KRT_DATABASE_URL", url)  # restored afterwards (main() sets it from --database)

    def run(*argv, stdin: str | None = None, as_user: str | None = None, signed: int = 0):
        if signed:
            argv = (*argv, "--password-stdin")
            stdin = (test_password + "\n") * signed
        if as_user is not None:
            login(url, as_user)
            capsys.readouterr()
        if stdin is not None:
            monkeypatch.setattr(sys, "stdin", io.StringIO(stdin))
        code = main(["--database", url, *argv])
        out, err = capsys.readouterr()
        return code, out, err

    return run
