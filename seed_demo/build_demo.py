"""Regenerate the demo import files and raw time courses from ``scenario.py``.

Run from the repository root:  ``python seed_demo/build_demo.py``.

The demo is invented.  Potency values are what each assay *would* read after
its incubation for the scenario's true kinetics (simulated with the tracker's
own kinetics layer, plus a little seeded noise), so the demo shows the
incubation artefacts the tracker is built to find.  The output is committed;
``krt demo load`` only reads it.
"""

from __future__ import annotations

import csv
import math
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import scenario as sc  # noqa: E402

from tracker.kinetics import assay, equations  # noqa: E402
from tracker.units import parse_quantity  # noqa: E402

RNG = np.random.default_rng(20261201)
RNG_EXTRA = np.random.default_rng(20261202)  # draws for the added rows, so the original rows keep their values
H, MIN = sc.H, sc.MIN


def q(text: str, kind: str) -> float:
    return parse_quantity(text, kind).si


def conc_text(m: float) -> str:
    for unit, f in (("uM", 1e-6), ("nM", 1e-9), ("pM", 1e-12)):
        if m >= f:
            return f"{m / f:.3g} {unit}"
    return f"{m / 1e-15:.3g} fM"


def write_csv(path: Path, header: list[str], rows: list[dict]) -> None:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=header, lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: r.get(k, "") for k in header})


def compounds():
    for row in sc.COMPOUNDS:
        name, program, series, stage, kon, rt, assays, kin, pk = row
        koff = 1.0 / rt
        yield dict(name=name, program=program, series=series, stage=stage, kon=kon, koff=koff,
                   kd=koff / kon, assays=assays, kin=kin, pk=pk)


def potency_rows(c) -> list[dict]:
    rows = []
    for i, name in enumerate(c["assays"]):
        readout, fmt, inc_text, extra = sc.ASSAYS[name]
        inc = q(inc_text, "time")
        if fmt == "competition-binding":
            t_kd = q(extra["tracer_kd"], "concentration")
            t_rt = q(extra["tracer_residence_time"], "time")
            t_conc = q(extra["tracer_conc"], "concentration")
            pre = q(extra["preincubation"], "time") if extra.get("preincubation") else 0.0
            app, _ = assay.apparent_affinity(c["kd"], c["koff"], inc, format="competition",
                                             tracer_kd=t_kd, tracer_koff=1 / t_rt, tracer_conc=t_conc, preincubation=pre)
            value = float(app)
        else:
            app, _ = assay.apparent_affinity(c["kd"], c["koff"], inc)
            value = float(app)
            if fmt == "enzyme":  # an IC50 at substrate = Km reads ~2x Ki (Cheng-Prusoff, competitive)
                value *= 2.0
                if extra.get("target_conc"):  # tight binding: IC50 = Kapp + [E]/2 (Morrison 1969; Copeland et al. 1995)
                    value += q(extra["target_conc"], "concentration") / 2.0
        added = c["name"] in sc.ADDED
        value *= 10 ** (RNG_EXTRA if added else RNG).normal(0, 0.04)
        value *= sc.VALUE_ERRORS.get((c["name"], name), 1.0)
        row = dict(compound=c["name"], assay=name, readout=readout, value=conc_text(value),
                   incubation=inc_text, format=fmt, date=f"2026-{3 + i:02d}-{10 + i:02d}", source="demo ELN export")
        row.update(extra)
        if fmt == "functional":
            row["max_response_fraction"] = f"{sc.MAX_RESPONSE.get(c['name'], 1.0):.2f}"
        rows.append(row)
    return rows


def kinetics_row(c, method: str, rt_factor: float = 1.0, rng=None) -> dict:
    rng = rng or (RNG_EXTRA if c["name"] in sc.ADDED else RNG)
    kon = c["kon"] * 10 ** rng.normal(0, 0.03)
    koff = c["koff"] / rt_factor * 10 ** rng.normal(0, 0.03)
    row = dict(compound=c["name"], method=method, kon=f"{kon:.3g} /M/s", kd=conc_text(koff / kon),
               kon_low=f"{kon / 1.4:.3g} /M/s", kon_high=f"{kon * 1.4:.3g} /M/s", date="2026-06-02",
               source="demo CRO report")
    rt = 1 / koff
    if rt >= 3600:  # long residence times are usually reported as RT, short ones as koff
        row["residence_time"] = f"{rt / 3600:.3g} h"
    else:
        row["koff"] = f"{koff:.3g} /s"
    row["koff_low"] = f"{koff / 1.3:.3g} /s"
    row["koff_high"] = f"{koff * 1.3:.3g} /s"
    return row


def noisy(y, sd):
    return y + RNG.normal(0, sd, size=np.shape(y))


def tc_rows(t, sig, conc=None, curve=None):
    out = []
    for i in range(len(t)):
        r = {"time": f"{t[i]:.6g}", "signal": f"{sig[i]:.5g}"}
        if conc is not None:
            r["concentration"] = f"{conc[i]:.6g}"
        if curve is not None:
            r["curve"] = curve[i]
        out.append(r)
    return out


def time_course(c, method: str, outdir: Path) -> dict:
    """Write a raw time course for ``c``; return its manifest row (units as written)."""
    name = c["name"]
    file = f"{name}_{method}.csv"
    man = dict(file=file, method=method, compound=name)  # units are in the headers: 'time (min)', 'concentration (nM)' 
    if method == "dissociation":
        t = np.linspace(0, 24 * 60, 25)  # min
        y = noisy(equations.dissociation(t * 60, c["koff"], b0=1000.0, nsb=60.0), 15.0)
        rows, header = tc_rows(t, y), ["time", "signal"]
    elif method == "association":
        t = np.linspace(0, 40, 21)
        concs = [1.0, 3.0, 10.0, 30.0]  # nM
        T, L = np.meshgrid(t, concs)
        y = noisy(equations.association(T * 60, L * 1e-9, c["kon"], c["koff"], bmax=1000.0), 12.0)
        rows = tc_rows(T.ravel(), y.ravel(), L.ravel())
        header = ["time", "signal", "concentration"]
    elif method == "competition-kinetics":
        tr_kon, tr_koff, tr_conc = 1e7, 2e-3, 2e-9
        man.update(tracer_kon="1e7 /M/s", tracer_koff="0.002 /s", tracer_conc="2 nM")
        t = np.linspace(0, 360, 49)
        concs = [0.0, 0.1, 0.3, 1.0]  # nM
        T, I = np.meshgrid(t, concs)
        y = equations.motulsky_mahan(T * 60, tr_conc, tr_kon, tr_koff, I * 1e-9, c["kon"], c["koff"], bmax=2000.0)
        y = noisy(y, 10.0)
        rows = tc_rows(T.ravel(), y.ravel(), I.ravel())
        header = ["time", "signal", "concentration"]
    elif method == "jump-dilution":
        t = np.linspace(0, 480, 41)
        vs = 10.0  # product units per min, uninhibited
        vi = 0.4
        kobs = c["koff"] * 1.1 * 60  # per min; 100-fold dilution from 10x IC50 (kobs = koff(1 + I/Ki))
        p = vs * t + (vi - vs) * (1 - np.exp(-kobs * t)) / kobs
        pc = vs * t
        rows = tc_rows(t, noisy(p, 20.0), curve=["inhibited"] * len(t)) + tc_rows(t, noisy(pc, 20.0), curve=["control"] * len(t))
        header = ["time", "signal", "curve"]
    elif method == "washout-recovery":
        t = np.linspace(0, 12 * 60, 25)
        y = noisy(100.0 * (1 - 0.9 * np.exp(-c["koff"] * t * 60)), 2.5)
        rows, header = tc_rows(t, y), ["time", "signal"]
    elif method == "ki-shift":
        doses = 10 ** np.linspace(-3, 3, 13)  # nM
        rows = []
        for inc_h in (1.0, 16.0):
            app, _ = assay.apparent_affinity(c["kd"], c["koff"], inc_h * H)
            y = noisy(equations.logistic4(doses, 2.0, 100.0, float(app) * 1e9, 1.0), 2.0)
            rows += tc_rows(doses, y, curve=[f"{inc_h:g} h"] * len(doses))
        rows = [dict(r, concentration=r.pop("time")) for r in rows]
        header = ["concentration", "signal", "curve"]
    elif method == "insurmountability":
        doses = 10 ** np.linspace(-2, 4, 13)  # nM agonist
        frac = sc.MAX_RESPONSE.get(name, 1.0)
        yc = noisy(equations.logistic4(doses, 0.0, 100.0, 3.0, -1.0), 2.0)  # agonist alone, EC50 3 nM
        ya = noisy(equations.logistic4(doses, 0.0, 100.0 * frac, 30.0, -1.0), 2.0)  # shifted 10x, max depressed
        rows = [dict(concentration=f"{d:.6g}", signal=f"{s:.5g}", curve="control") for d, s in zip(doses, yc)]
        rows += [dict(concentration=f"{d:.6g}", signal=f"{s:.5g}", curve="+antagonist 10 nM") for d, s in zip(doses, ya)]
        header = ["concentration", "signal", "curve"]
    else:
        raise ValueError(method)
    units = {"time": "time (min)", "concentration": "concentration (nM)"}
    write_csv(outdir / file, [units.get(h, h) for h in header], [{units.get(k, k): v for k, v in r.items()} for r in rows])
    return man


def main() -> None:
    out = HERE
    tcdir = out / "timecourses"
    tcdir.mkdir(exist_ok=True)
    write_csv(out / "programs.csv", ["program", "target", "intended_profile", "engagement_threshold", "onset_max",
                                     "duration_min", "offset_max", "dosing_interval", "target_half_life"], sc.PROGRAMS)
    comps, pot, kin, pk, manifest = [], [], [], [], []
    seen: dict[str, int] = {}
    for c in compounds():
        k = seen[c["series"]] = seen.get(c["series"], -1) + 1
        core = sc.SERIES_CORES.get(c["series"])
        smiles = core.replace("{R}", sc.R_GROUPS[k % len(sc.R_GROUPS)]) if core else ""
        comps.append(dict(compound=c["name"], program=c["program"], series=c["series"], stage=c["stage"], smiles=smiles))
        pot += potency_rows(c)
        if c["kin"]:
            kind, method = c["kin"].split(":")
            if kind == "csv":
                kin.append(kinetics_row(c, method))
                for extra_method, factor in sc.EXTRA_KINETICS.get(c["name"], []):
                    kin.append(dict(kinetics_row(c, extra_method, factor, RNG_EXTRA), date="2026-07-14", source="demo second CRO report"))
            else:
                manifest.append(time_course(c, method, tcdir))
        if c["pk"]:
            species, route, hl, cmax, tmax, tau = c["pk"]
            pk.append(dict(compound=c["name"], species=species, route=route, half_life=hl, free_cmax=cmax,
                           tmax=tmax, dosing_interval=tau))
    write_csv(out / "compounds.csv", ["compound", "program", "series", "stage", "smiles"], comps)
    write_csv(out / "potency.csv", ["compound", "assay", "readout", "value", "incubation", "format", "tracer_conc",
                                    "tracer_kd", "tracer_residence_time", "max_response_fraction", "date", "source",
                                    "preincubation", "max_incubation", "target_conc"], pot)
    write_csv(out / "kinetics.csv", ["compound", "method", "kon", "koff", "residence_time", "kd", "kon_low", "kon_high",
                                     "koff_low", "koff_high", "date", "source"], kin)
    write_csv(out / "pk.csv", ["compound", "species", "route", "half_life", "free_cmax", "tmax", "dosing_interval"], pk)
    write_csv(tcdir / "manifest.csv", ["file", "method", "compound", "tracer_kon", "tracer_koff", "tracer_conc"], manifest)
    print(f"wrote {len(comps)} compounds, {len(pot)} potency rows, {len(kin)} kinetics rows, {len(pk)} PK rows, "
          f"{len(manifest)} time courses")


if __name__ == "__main__":
    main()
