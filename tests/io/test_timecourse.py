"""The time-course reader (tracker.io.timecourse): same reading layer as imports, units required, plate layouts.

Simulated data come from the closed forms of one-site binding with seeded
noise: dissociation B(t) = B0·exp(-koff·t) + NSB (Copeland, Pompliano & Meek
2006, Nat Rev Drug Discov 5:730) and pseudo-first-order association
B(t) = Bmax·L/(L+KD)·(1 - exp(-(kon·L + koff)·t)) (Hulme & Trevethick 2010,
Br J Pharmacol 161:1219), written out here rather than taken from the package.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tracker.cli import main
from tracker.errors import InputError
from tracker.io.timecourse import read_time_course, read_well_map


def write(path, text):
    path.write_text(text)
    return path


def csv_text(header, rows):
    return header + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n"


def decay(t_s, koff, b0=1000.0, nsb=50.0):
    return b0 * np.exp(-koff * t_s) + nsb  # Copeland et al. 2006


def rise(t_s, conc, kon, koff, bmax=1000.0):
    kd = koff / kon
    return bmax * conc / (conc + kd) * (1 - np.exp(-(kon * conc + koff) * t_s))  # Hulme & Trevethick 2010


# ------------------------------------------------------------------ long layout
def test_reader_converts_columns_to_si_and_keeps_line_numbers(tmp_path):
    path = write(tmp_path / "r.csv", csv_text("Time (min),signal,Concentration [nM],curve,note",
                                              [(0, 1, 5, "a", "x"), (2, 3, 5, "a", "")]))
    df = read_time_course(path, "association")
    assert list(df["time"]) == [0.0, 120.0]
    assert df["concentration"].tolist() == pytest.approx([5e-9, 5e-9])
    assert df["line"].tolist() == [2, 3] and df.attrs["source"] == str(path)
    assert df.attrs["units"] == {"time": "min", "concentration": "nM"}


def test_units_can_come_from_the_caller_when_the_header_has_none(tmp_path):
    path = write(tmp_path / "r.csv", csv_text("time,signal", [(0, 1), (3, 2)]))
    df = read_time_course(path, "dissociation", time_unit="h")
    assert df["time"].tolist() == [0.0, 3 * 3600.0]


@pytest.mark.parametrize("method,header,column", [
    ("dissociation", "time,signal", "time"),
    ("association", "time (s),signal,concentration", "concentration"),
    ("ki-shift", "concentration,signal,incubation (h)", "concentration"),
    ("ki-shift", "concentration (nM),signal,incubation", "incubation"),
])
def test_a_column_without_a_unit_is_refused_at_its_header(tmp_path, method, header, column):
    path = write(tmp_path / "u.csv", csv_text(header, [(1, 2, 3)[: header.count(",") + 1]]))
    with pytest.raises(InputError) as exc:
        read_time_course(path, method)
    assert exc.value.location.line == 1 and exc.value.location.column == column
    assert "a unit is needed" in str(exc.value)


def test_ki_shift_labels_without_a_unit_need_one(tmp_path):
    path = write(tmp_path / "k.csv", csv_text("concentration (nM),signal,curve", [(1, 2, "30 min"), (1, 2, "2")]))
    with pytest.raises(InputError) as exc:
        read_time_course(path, "ki-shift")
    assert exc.value.location.line == 3 and "a unit is needed" in str(exc.value)
    df = read_time_course(path, "ki-shift", time_unit="h")
    assert df["incubation"].tolist() == [1800.0, 7200.0]


def test_errors_carry_file_line_and_column_in_the_import_format(tmp_path):
    path = write(tmp_path / "bad.csv", csv_text("time (s),signal", [(0, 1), (60, "n/a")]))
    with pytest.raises(InputError) as exc:
        read_time_course(path, "dissociation")
    assert str(exc.value) == f"{path}:3: signal: not a number: 'n/a'"


@pytest.mark.parametrize("text,message", [
    ("time (s);signal\n0;1\n", "the file uses ';' between fields; save it comma-separated"),
    ("time (s)\tsignal\n0\t1\n", "the file uses tabs between fields; save it comma-separated"),
    (b"time (s),signal\n0,\xff\n", "is not UTF-8"),
    ("time (s),signal\n0,1,7\n", "line has 3 fields but the header has 2"),
])
def test_delimiters_and_encodings_follow_the_import_rules(tmp_path, text, message):
    from tracker.io.reading import read_csv

    path = tmp_path / "x.csv"
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    with pytest.raises(InputError) as exc:
        read_time_course(path, "dissociation")
    assert message in str(exc.value)
    # the import reads the same file with the same message
    assert message in str(read_csv(path, "kinetics").errors[0])


def test_an_upload_reads_like_a_file(tmp_path):
    data = csv_text("time (min),signal", [(0, 5), (1, 4)]).encode()
    df = read_time_course(("plate 3.csv", data), "dissociation")
    assert df["time"].tolist() == [0.0, 60.0] and df.attrs["source"] == "plate 3.csv"
    with pytest.raises(InputError, match=r"^plate 3\.csv:1: the file uses ';'"):
        read_time_course(("plate 3.csv", b"time (min);signal\n0;1\n"), "dissociation")


def test_a_one_sheet_workbook_is_read_like_a_csv(tmp_path):
    openpyxl = pytest.importorskip("openpyxl")
    book = openpyxl.Workbook()
    ws = book.active
    ws.append(["time (min)", "signal"])
    ws.append([0, 10.0])
    ws.append([5, 7.5])
    book.save(tmp_path / "tc.xlsx")
    df = read_time_course(tmp_path / "tc.xlsx", "dissociation")
    assert df["time"].tolist() == [0.0, 300.0] and df["signal"].tolist() == [10.0, 7.5]


# ------------------------------------------------------------------ replicates
def test_replicate_labels_are_passed_on_to_the_fit(tmp_path):
    rows = [(t, 1, "cpd", r) for r in ("r1", "r2") for t in (0, 1, 2)]
    df = read_time_course(write(tmp_path / "wo.csv", csv_text("time (h),signal,curve,replicate", rows)), "washout-recovery")
    assert df["replicate"].tolist() == ["r1"] * 3 + ["r2"] * 3 and set(df["curve"]) == {"cpd"}
    with pytest.raises(InputError, match=r"wo2\.csv:3: replicate: empty cell"):
        read_time_course(write(tmp_path / "wo2.csv", "time (h),signal,curve,replicate\n0,1,a,r1\n1,1,a,\n"), "washout-recovery")


def test_dissociation_replicates_share_koff_from_the_command_line(tmp_path, capsys):
    rng = np.random.default_rng(11)
    t = np.linspace(0, 120, 25)  # min
    rows = []
    for rep, b0 in (("a", 900.0), ("b", 1200.0), ("c", 1000.0)):  # plate-to-plate gain differs
        y = decay(t * 60, 5e-4, b0=b0) + rng.normal(0, 10, t.size)
        rows += [(a, f"{b:.2f}", rep) for a, b in zip(t, y)]
    path = write(tmp_path / "reps.csv", csv_text("time (min),signal,replicate", rows))
    assert main(["fit", "dissociation", str(path), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["koff_per_s"] == pytest.approx(5e-4, rel=0.1)
    assert d["n_points"] == 75


# ------------------------------------------------------------------ plate layout
def plate(tmp_path, rng, concs_nM=(1, 3, 10, 30), reps=("1", "2"), kon=1e6, koff=1e-3):
    """A plate export: time in minutes and one column per well; map wells -> concentration and curve."""
    t = np.linspace(0, 40, 21)
    cols, wmap = {}, []
    for i, c in enumerate(concs_nM):
        for j, r in enumerate(reps):
            well = f"{'ABCDEFGH'[i]}{j + 1}"
            cols[well] = rise(t * 60, c * 1e-9, kon, koff) * (1 + 0.1 * j) + rng.normal(0, 8, t.size)
            wmap.append((well, c, f"L{c}"))
    header = "Time (min)," + ",".join(cols)
    rows = [(f"{t[k]:g}", *(f"{cols[w][k]:.3f}" for w in cols)) for k in range(t.size)]
    data = write(tmp_path / "plate.csv", csv_text(header, rows))
    mp = write(tmp_path / "map.csv", csv_text("well,concentration (nM),curve", wmap))
    return data, mp


def test_a_plate_layout_with_a_well_map_melts_into_curves(tmp_path):
    data, mp = plate(tmp_path, np.random.default_rng(1))
    df = read_time_course(data, "association", well_map=mp)
    assert df.attrs["layout"] == "wide" and len(df) == 8 * 21
    assert sorted(set(df["curve"])) == ["L1", "L10", "L3", "L30"]
    assert sorted(set(df.loc[df["curve"] == "L3", "replicate"])) == ["B1", "B2"]  # wells sharing a curve: replicates
    assert sorted(set(df["concentration"])) == pytest.approx([1e-9, 3e-9, 1e-8, 3e-8])
    assert df.loc[df["replicate"] == "B2", "line"].tolist() == list(range(2, 23))


def test_a_plate_association_is_fitted_jointly_from_the_command_line(tmp_path, capsys):
    data, mp = plate(tmp_path, np.random.default_rng(2))
    assert main(["fit", "association", str(data), "--well-map", str(mp), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["kon_per_M_per_s"] == pytest.approx(1e6, rel=0.15)  # truth of the simulation
    assert d["koff_per_s"] == pytest.approx(1e-3, rel=0.15)
    assert d["n_points"] == 8 * 21


def test_plate_wells_without_a_map_are_their_own_curves(tmp_path):
    t = np.arange(0, 10)
    rows = [(a, 100 - a, 90 - a) for a in t]
    df = read_time_course(write(tmp_path / "p.csv", csv_text("time (min),B07,C07", rows)), "dissociation")
    assert sorted(set(df["curve"])) == ["B07", "C07"]


def test_the_well_map_may_come_from_an_editor_table(tmp_path):
    data, _ = plate(tmp_path, np.random.default_rng(3), concs_nM=(1, 10), reps=("1",))
    editor = pd.DataFrame({"well": ["A1", "B1"], "concentration": ["1 nM", "10 nM"], "curve": [None, ""]})
    df = read_time_course(data, "association", well_map=editor)
    assert sorted(set(df["curve"])) == ["A1", "B1"]
    assert sorted(set(df["concentration"])) == pytest.approx([1e-9, 1e-8])


@pytest.mark.parametrize("map_text,where,message", [
    ("well,concentration (nM),curve\nA1,1,x\nA2,1,x\nB1,3,y\nB2,3,y\nC1,10,z\n", "map.csv:6: well",
     "well 'C1' is not a column of"),
    ("well,concentration (nM),curve\nA1,1,x\nA2,1,x\nB1,3,y\n", "plate.csv:1: B2", "well 'B2' is not in the well map"),
    ("well,concentration,curve\nA1,1,x\nA2,1,x\nB1,3,y\nB2,3,y\n", "map.csv:2: concentration", "a unit is needed"),
    ("well,concentration (nM)\nA1,1\nA1,2\n", "map.csv:3: well", "well 'A1' appears twice"),
    ("well,concentration (nM)\nA1,-1\n", "map.csv:2: concentration", "negative concentration"),
    ("plate,concentration (nM)\nA1,1\n", "map.csv:1: well", "missing column 'well'"),
    ("well,concentration (nM),curve\nA1,1,x\nA2,1,x\nB1,3 min,y\nB2,3,y\n", "map.csv:4: concentration", "is a time"),
])
def test_well_map_problems_are_located(tmp_path, map_text, where, message):
    data, _ = plate(tmp_path, np.random.default_rng(4), concs_nM=(1, 3))
    mp = write(tmp_path / "map.csv", map_text)
    with pytest.raises(InputError) as exc:
        read_time_course(data, "association", well_map=mp)
    text = str(exc.value)
    assert where in text and message in text


def test_a_well_map_with_a_long_file_is_refused(tmp_path):
    data = write(tmp_path / "long.csv", csv_text("time (s),signal", [(0, 1), (1, 2)]))
    mp = write(tmp_path / "map.csv", "well,curve\nA1,x\n")
    with pytest.raises(InputError, match="a well map goes with the plate layout"):
        read_time_course(data, "dissociation", well_map=mp)


def test_the_cli_reports_a_plate_problem_on_one_line(tmp_path, capsys):
    data, _ = plate(tmp_path, np.random.default_rng(5), concs_nM=(1, 3))
    mp = write(tmp_path / "map.csv", "well,concentration (nM),curve\nA1,1,x\n")
    assert main(["fit", "association", str(data), "--well-map", str(mp)]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "plate.csv:1: A2: well 'A2' is not in the well map" in err[0]


def test_read_well_map_keeps_zero_for_tracer_alone(tmp_path):
    mp = write(tmp_path / "m.csv", "well,concentration,curve\nA1,0 nM,tracer\nA2,3 nM,\n")
    wm = read_well_map(mp)
    assert wm.wells["A1"] == (0.0, "tracer") and wm.wells["A2"][0] == pytest.approx(3e-9)
