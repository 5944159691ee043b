"""The demo scenario: three invented programs and their compounds.

Everything here is invented for the demo (names, targets, numbers); none of it
is a real compound, target or company.  ``build_demo.py`` turns this table into
the import files and raw time courses under ``seed_demo/``.

Each compound carries the *true* kinetics the generator uses to simulate what
its assays would read; the tracker only ever sees the simulated readouts, the
fitted time courses and the kinetic rows flagged ``measured``.
"""

from __future__ import annotations

H = 3600.0
MIN = 60.0

PROGRAMS = [
    # name, target, profile, threshold, onset_max, duration_min, offset_max, dosing_interval[, target_half_life]
    dict(program="Heronfield", target="HFK1 kinase (invented)", intended_profile="once-daily",
         engagement_threshold=0.7, onset_max="3 h", duration_min="20 h", offset_max="", dosing_interval="24 h",
         target_half_life="10 h"),
    dict(program="Quillmere", target="QMR1 receptor (invented)", intended_profile="short-acting",
         engagement_threshold=0.3, onset_max="30 min", duration_min="2 h", offset_max="8 h", dosing_interval=""),
    dict(program="Tallowmoor", target="Tallowmoor protease (invented)", intended_profile="twice-daily",
         engagement_threshold=0.5, onset_max="2 h", duration_min="10 h", offset_max="", dosing_interval="12 h"),
]

# Assays per program: name -> (readout, format, incubation, extra columns)
ASSAYS = {
    # the kinase assays run at most a day (plate stability): beyond it a slow amide gets a kinetic method recommended
    "HF bind 1h": ("KD", "binding", "1 h", {"max_incubation": "24 h"}),
    "HF bind 16h": ("KD", "binding", "16 h", {"max_incubation": "24 h"}),
    "HF kinase act": ("IC50", "enzyme", "30 min", {"max_incubation": "24 h"}),
    "QM tracer comp": ("Ki", "competition-binding", "1 h",
                       {"tracer_conc": "1 nM", "tracer_kd": "0.5 nM", "tracer_residence_time": "10 min"}),
    "QM calcium antag": ("Kb", "functional", "30 min", {}),
    # a slowly dissociating tracer (RT 3 h) used at 10x its KD and read after 30 min: fast compounds read too potent
    "QM slow tracer comp": ("Ki", "competition-binding", "30 min",
                            {"tracer_conc": "2 nM", "tracer_kd": "0.2 nM", "tracer_residence_time": "3 h", "preincubation": "10 min"}),
    "TM protease 15m": ("IC50", "enzyme", "15 min", {}),
    "TM protease 3h": ("IC50", "enzyme", "3 h", {}),
    # the high-sensitivity format runs 20 nM enzyme: IC50s cannot fall below [E]/2 = 10 nM (Morrison)
    "TM protease hi-E": ("IC50", "enzyme", "1 h", {"target_conc": "20 nM"}),
    "TM protease lo-E": ("IC50", "enzyme", "1 h", {"target_conc": "0.1 nM"}),
}

# name, program, series, stage, kon /M/s, residence time s (KD = 1/(kon*RT)), assays, kinetics, pk
# kinetics: None (not measured), "csv:<method>" (a kinetics.csv row), "fit:<method>" (a raw time course)
# pk: None or (species, route, half_life, free_cmax, tmax, dosing_interval)
COMPOUNDS = [
    # ---- Heronfield: once-daily kinase program; amides dissociate slowly, ureas fast
    ("HF-1001", "Heronfield", "HF-amide", "hit", 1.5e6, 40 * H, ["HF bind 1h"], None, None),
    ("HF-1002", "Heronfield", "HF-urea", "hit", 2e6, 4 * MIN, ["HF bind 1h"], None, None),
    ("HF-1003", "Heronfield", "HF-amide", "hit-to-lead", 1.2e6, 12 * H, ["HF bind 1h", "HF bind 16h"], "fit:ki-shift", None),
    ("HF-1004", "Heronfield", "HF-urea", "hit-to-lead", 2e6, 6 * MIN, ["HF bind 1h", "HF bind 16h"], None, None),
    ("HF-1005", "Heronfield", "HF-amide", "lead-optimization", 1e6, 20 * H, ["HF bind 1h", "HF bind 16h"], None, None),
    ("HF-1006", "Heronfield", "HF-urea", "lead-optimization", 3e6, 5 * MIN, ["HF bind 1h"], None, None),
    ("HF-1007", "Heronfield", "HF-amide", "lead-optimization", 8e5, 18 * H, ["HF bind 1h", "HF kinase act"], "fit:competition-kinetics", None),
    ("HF-1008", "Heronfield", "HF-amide", "advanced-lead", 1e6, 10 * H, ["HF bind 1h"], None, None),
    ("HF-1009", "Heronfield", "HF-urea", "advanced-lead", 2.5e6, 8 * MIN, ["HF bind 1h"], "fit:association", None),
    ("HF-1010", "Heronfield", "HF-amide", "candidate", 1.1e6, 30 * H, ["HF bind 16h", "HF kinase act"], "csv:competition-kinetics",
     ("rat", "oral", "6 h", "20 nM", "1.5 h", "24 h")),
    ("HF-1011", "Heronfield", "HF-urea", "candidate", 3e6, 10 * MIN, ["HF bind 1h"], "csv:spr",
     ("rat", "oral", "3 h", "30 nM", "1 h", "24 h")),
    ("HF-1012", "Heronfield", "HF-amide", "clinical", 9e5, 36 * H, ["HF bind 16h"], "csv:competition-kinetics",
     ("human", "oral", "10 h", "15 nM", "2 h", "24 h")),
    ("HF-1013", "Heronfield", "HF-amide", "candidate", 1e6, 24 * H, ["HF bind 16h"], "csv:spr", None),
    ("HF-1014", "Heronfield", "HF-urea", "lead-optimization", 2e6, 15 * MIN, ["HF bind 1h"], "fit:insurmountability", None),
    # ---- Quillmere: short-acting receptor program; spiro series slow, biaryl fast
    ("QM-2001", "Quillmere", "QM-spiro", "hit", 5e5, 3 * H, ["QM tracer comp"], None, None),
    ("QM-2002", "Quillmere", "QM-biaryl", "hit", 4e6, 2 * MIN, ["QM tracer comp"], None, None),
    ("QM-2003", "Quillmere", "QM-spiro", "hit-to-lead", 6e5, 5 * H, ["QM calcium antag"], None, None),
    ("QM-2004", "Quillmere", "QM-biaryl", "hit-to-lead", 3e6, 3 * MIN, ["QM calcium antag"], None, None),
    ("QM-2005", "Quillmere", "QM-spiro", "lead-optimization", 7e5, 3 * H, ["QM tracer comp"], "fit:washout-recovery", None),
    ("QM-2006", "Quillmere", "QM-biaryl", "lead-optimization", 5e6, 5 * MIN, ["QM tracer comp"], "csv:spr", None),
    ("QM-2007", "Quillmere", "QM-spiro", "advanced-lead", 8e5, 6 * H, ["QM tracer comp"], "fit:dissociation",
     ("rat", "oral", "2 h", "40 nM", "45 min", "")),
    ("QM-2008", "Quillmere", "QM-biaryl", "advanced-lead", 4e6, 4 * MIN, ["QM tracer comp"], "csv:spr",
     ("rat", "oral", "2 h", "5 nM", "30 min", "")),
    ("QM-2009", "Quillmere", "QM-biaryl", "candidate", 5e6, 5 * MIN, ["QM tracer comp"], "csv:spr",
     ("dog", "oral", "2 h", "3 nM", "20 min", "")),
    ("QM-2010", "Quillmere", "QM-spiro", "candidate", 1e6, 6 * H, ["QM tracer comp"], "csv:competition-kinetics",
     ("dog", "oral", "2 h", "40 nM", "30 min", "")),
    ("QM-2011", "Quillmere", "QM-biaryl", "clinical", 6e6, 3 * MIN, ["QM tracer comp"], "csv:spr",
     ("human", "oral", "1.5 h", "8 nM", "20 min", "")),
    ("QM-2012", "Quillmere", "QM-spiro", "candidate", 9e5, 8 * H, ["QM tracer comp"], None,
     ("dog", "oral", "2 h", "40 nM", "30 min", "")),
    # ---- Tallowmoor: twice-daily protease program; lactams slow, nitriles fast
    ("TM-3001", "Tallowmoor", "TM-lactam", "hit", 4e5, 20 * MIN, ["TM protease 15m"], None, None),
    ("TM-3002", "Tallowmoor", "TM-nitrile", "hit-to-lead", 5e5, 6 * H, ["TM protease 15m", "TM protease 3h"], None, None),
    ("TM-3003", "Tallowmoor", "TM-lactam", "lead-optimization", 6e5, 2 * H, ["TM protease 15m"], "fit:jump-dilution", None),
    ("TM-3004", "Tallowmoor", "TM-nitrile", "advanced-lead", 1e6, 40 * MIN, ["TM protease 15m", "TM protease 3h"], "fit:jump-dilution",
     ("rat", "oral", "4 h", "100 nM", "1 h", "12 h")),
    ("TM-3005", "Tallowmoor", "TM-lactam", "candidate", 8e5, 2 * H, ["TM protease 3h"], "csv:jump-dilution",
     ("dog", "oral", "5 h", "60 nM", "1.5 h", "12 h")),
    ("TM-3006", "Tallowmoor", "TM-nitrile", "clinical", 1.2e6, 45 * MIN, ["TM protease 3h"], "csv:jump-dilution",
     ("human", "oral", "6 h", "80 nM", "2 h", "12 h")),
    ("TM-3007", "Tallowmoor", "TM-lactam", "hit-to-lead", 5e5, 30 * H, ["TM protease 15m"], None, None),
    # ---- added last, so the seeded noise of every compound above is unchanged
    # Heronfield's kinase turns over (target t1/2 10 h): a week-long residence time cannot hold it once daily
    ("HF-1015", "Heronfield", "HF-amide", "lead-optimization", 2e5, 7 * 24 * H, ["HF bind 16h"], "csv:spr",
     ("rat", "oral", "6 h", "0.9 nM", "1.5 h", "24 h")),
    # ---- added for the evidence model's findings (each fires here and stays silent elsewhere); their random
    # draws come from a second generator, so every compound above keeps its values
    ("HF-1016", "Heronfield", "HF-amide", "lead-optimization", 1e6, 15 * H, ["HF bind 16h"], "csv:spr", None),
    ("HF-1017", "Heronfield", "HF-urea", "hit", 2e6, 5 * MIN, ["HF bind 1h"], None, None),
    ("QM-2013", "Quillmere", "QM-biaryl", "lead-optimization", 5e6, 4 * MIN, ["QM slow tracer comp"], "csv:spr", None),
    ("TM-3008", "Tallowmoor", "TM-nitrile", "hit-to-lead", 5e6, 20 * MIN, ["TM protease hi-E"], None, None),
    ("TM-3009", "Tallowmoor", "TM-nitrile", "hit-to-lead", 5e6, 20 * MIN, ["TM protease lo-E"], None, None),
]

#: compounds added for the evidence model (their random draws come from a second generator)
ADDED = {"HF-1016", "HF-1017", "QM-2013", "TM-3008", "TM-3009"}

# further kinetic runs of a compound: (method, residence-time factor against its true RT); a factor far from 1 is a
# faulty run (HF-1016: a competition-kinetics run read an eighth of the RT, conflicting), one near 1 a replicate (HF-1012)
EXTRA_KINETICS = {"HF-1016": [("competition-kinetics", 0.125)], "HF-1012": [("spr", 1.25)]}

# transcription errors in the ELN export: (compound, assay) -> factor on the value (HF-1017: pM typed for nM)
VALUE_ERRORS = {("HF-1017", "HF bind 1h"): 1e-3}

# functional antagonist curves: fraction of the agonist maximum left (1 = surmountable)
MAX_RESPONSE = {"QM-2003": 0.45, "QM-2004": 0.96, "HF-1014": 0.97}

USERS = [("demo-lead", "lead"), ("demo-scientist", "scientist"), ("demo-viewer", "viewer")]

# Invented structures: one generic core per series with a substituent that varies along the series
# ({R} on an aromatic ring).  Plain fragments chosen for the drawings, not any known compound.
SERIES_CORES = {
    "HF-amide": "O=C(Nc1ccc({R})cc1)c1ccncc1",
    "HF-urea": "O=C(Nc1ccc({R})cc1)NC1CCOCC1",
    "QM-biaryl": "NC(=O)c1cccc(-c2ccc({R})cn2)c1",
    "QM-spiro": "O=C1NCC2(CCN(Cc3ccc({R})cc3)CC2)C1",
    "TM-lactam": "O=C1CCC(N1)C(=O)Nc1ccc({R})cc1",
    "TM-nitrile": "N#CC1CCN(C(=O)c2ccc({R})cc2)C1",
}
R_GROUPS = ("F", "Cl", "OC", "C", "C(F)(F)F", "C#N", "OC(F)(F)F", "N(C)C")
