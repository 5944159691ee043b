"""Export in the import format: one CSV per table and, optionally, one ``.xlsx`` with a sheet per table.

Quantities are written as the text they arrived with, so importing an export
into an empty database and exporting again gives identical files.  A value
stored without its text (e.g. a saved fit) is written in SI with its unit.
All tables are read in one read transaction, so the files are consistent.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, select

from ..db.models import Compound, KineticMeasurement, PKProfile, Potency, Program
from ..db.uow import UnitOfWork
from .specs import SPECS

SI_UNIT_TEXT = {"concentration": "M", "time": "s", "rate1": "/s", "rate2": "/M/s", "fraction": ""}


def _text(text: str | None, si: float | None, kind: str) -> str | None:
    if text is not None and text != "":
        return text
    if si is None:
        return None
    unit = SI_UNIT_TEXT[kind]
    return f"{si!r} {unit}".strip()


def _quantity_cells(row: Any, spec_name: str, names: tuple[str, ...]) -> dict[str, str | None]:
    spec = SPECS[spec_name]
    out = {}
    for n in names:
        c = spec.col(n)
        out[n] = _text(getattr(row, c.text_db), getattr(row, c.db), c.kind)
    return out


def collect_rows(session) -> dict[str, list[dict[str, str | None]]]:
    """Every table of the format as rows of text cells, in insertion order."""
    tables: dict[str, list[dict[str, str | None]]] = {}

    rows = session.execute(select(Program).order_by(Program.id)).scalars()
    tables["programs"] = [
        {"program": p.name, "target": p.target, "intended_profile": p.intended_profile,
         **_quantity_cells(p, "programs", ("engagement_threshold", "onset_max", "duration_min", "offset_max", "dosing_interval"))}
        for p in rows
    ]

    q = select(Compound.name, Program.name.label("program"), Compound.series, Compound.stage, Compound.smiles).join(
        Program, Program.id == Compound.program_id).order_by(Compound.id)
    tables["compounds"] = [{"compound": r.name, "program": r.program, "series": r.series, "stage": r.stage, "smiles": r.smiles} for r in session.execute(q)]

    q = select(Potency, Compound.name).join(Compound, Compound.id == Potency.compound_id).order_by(Potency.id)
    tables["potency"] = [
        {"compound": name, "assay": m.assay, "readout": m.readout,
         **_quantity_cells(m, "potency", ("value", "incubation")), "format": m.format,
         **_quantity_cells(m, "potency", ("tracer_conc", "tracer_kd", "tracer_residence_time", "max_response_fraction")),
         "date": m.measured_on.isoformat() if m.measured_on else None, "source": m.source}
        for m, name in session.execute(q)
    ]

    q = select(KineticMeasurement, Compound.name).join(Compound, Compound.id == KineticMeasurement.compound_id).order_by(KineticMeasurement.id)
    kin = []
    for m, name in session.execute(q):
        as_rt = m.koff_given_as == "residence_time" and m.koff_text
        kin.append(
            {"compound": name, "method": m.method, "kon": _text(m.kon_text, m.kon_per_M_s, "rate2"),
             "koff": None if as_rt else _text(m.koff_text, m.koff_per_s, "rate1"),
             "residence_time": m.koff_text if as_rt else None,
             **_quantity_cells(m, "kinetics", ("kd", "kon_low", "kon_high", "koff_low", "koff_high")),
             "date": m.measured_on.isoformat() if m.measured_on else None, "source": m.source}
        )
    tables["kinetics"] = kin

    q = select(PKProfile, Compound.name).join(Compound, Compound.id == PKProfile.compound_id).order_by(PKProfile.id)
    tables["pk"] = [
        {"compound": name, "species": m.species, "route": m.route,
         **_quantity_cells(m, "pk", ("half_life", "free_cmax", "tmax", "dosing_interval")), "source": m.source}
        for m, name in session.execute(q)
    ]
    return tables


def export_tables(engine: Engine, out_dir: Path, xlsx: Path | None = None) -> dict[str, Any]:
    """Write ``<table>.csv`` for every table to ``out_dir`` (and a workbook to ``xlsx``); returns counts and paths."""
    with UnitOfWork(engine, write=False) as uow:
        tables = collect_rows(uow.session)
    out_dir.mkdir(parents=True, exist_ok=True)
    summary: dict[str, Any] = {"dir": str(out_dir), "tables": {}}
    for name, rows in tables.items():
        cols = SPECS[name].names
        path = out_dir / f"{name}.csv"
        with path.open("w", encoding="utf-8", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(cols)
            for r in rows:
                w.writerow(["" if r.get(c) is None else r[c] for c in cols])
        summary["tables"][name] = {"rows": len(rows), "file": str(path)}
    if xlsx is not None:
        write_xlsx(tables, xlsx)
        summary["xlsx"] = str(xlsx)
    return summary


def write_xlsx(tables: dict[str, list[dict[str, str | None]]], path: Path) -> None:
    """One sheet per table, every cell as text (so units and digits survive)."""
    from openpyxl import Workbook

    book = Workbook(write_only=True)
    for name, rows in tables.items():
        ws = book.create_sheet(name)
        cols = SPECS[name].names
        ws.append(list(cols))
        for r in rows:
            ws.append([r.get(c) for c in cols])
    path.parent.mkdir(parents=True, exist_ok=True)
    book.save(path)


__all__ = ["export_tables", "collect_rows", "write_xlsx"]
