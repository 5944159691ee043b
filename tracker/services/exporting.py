"""``krt export``: every table in the import format, as CSV files and optionally one ``.xlsx`` workbook.

Quantities are written as the text they arrived with, so importing an export
into an empty database and exporting again gives identical files.  A value
stored without its text (e.g. a saved fit), or whose text no longer reads
back as exactly the stored float (texts rounded by older versions), is
written in SI at full precision with its unit, so nothing is lost on the way
back in.  All tables are read in one read transaction, so the files are
consistent.  Cells a spreadsheet could run as formulas are neutralised
(:mod:`tracker.io.export`).
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, select

from ..db.models import Compound, KineticMeasurement, PKProfile, Potency, Program
from ..db.uow import UnitOfWork
from ..errors import UnitError
from ..io.export import si_text, write_csv, write_xlsx
from ..io.specs import SPECS
from ..units import parse_quantity


@lru_cache(maxsize=65_536)
def _reads_as(text: str, kind: str) -> float | None:
    try:
        return parse_quantity(text, kind, positive=False).si
    except UnitError:
        return None


def _text(text: str | None, si: float | None, kind: str) -> str | None:
    """The cell for a stored quantity: its own text when that reads back as exactly ``si``, else ``si`` in SI."""
    if si is None:
        return text or None
    if text and _reads_as(text, kind) == si:
        return text
    return si_text(si, kind)


def _quantity_cells(row: Any, spec_name: str, names: tuple[str, ...]) -> dict[str, str | None]:
    spec = SPECS[spec_name]
    out = {}
    for n in names:
        c = spec.col(n)
        out[n] = _text(getattr(row, c.text_db), getattr(row, c.db), c.kind)
    return out


def _residence_time_cell(text: str | None, koff: float | None) -> str | None:
    """A koff given as a residence time: its text when 1/RT is the stored koff, else RT = 1/koff in seconds."""
    if koff is None:
        return text or None
    rt = _reads_as(text, "time") if text else None
    if rt is not None and rt > 0 and 1.0 / rt == koff:
        return text
    return si_text(1.0 / koff, "time")


def collect_rows(session) -> dict[str, list[dict[str, str | None]]]:
    """Every table of the format as rows of text cells, in insertion order."""
    tables: dict[str, list[dict[str, str | None]]] = {}

    rows = session.execute(select(Program).order_by(Program.id)).scalars()
    tables["programs"] = [
        {"program": p.name, "target": p.target, "intended_profile": p.intended_profile,
         **_quantity_cells(p, "programs", ("engagement_threshold", "onset_max", "duration_min", "offset_max", "dosing_interval",
                                           "target_half_life"))}
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
         "date": m.measured_on.isoformat() if m.measured_on else None, "source": m.source,
         **_quantity_cells(m, "potency", ("preincubation", "max_incubation", "target_conc"))}
        for m, name in session.execute(q)
    ]

    # a superseded value is not exported: the format has no column for it, and re-imported it would come back as
    # current evidence, silently undoing a reviewed supersession (it stays on record in the database and its audit trail)
    q = (select(KineticMeasurement, Compound.name).join(Compound, Compound.id == KineticMeasurement.compound_id)
         .where(KineticMeasurement.superseded_by_id.is_(None)).order_by(KineticMeasurement.id))
    kin = []
    for m, name in session.execute(q):
        as_rt = m.koff_given_as == "residence_time" and m.koff_text
        kin.append(
            {"compound": name, "method": m.method, "kon": _text(m.kon_text, m.kon_per_M_s, "rate2"),
             "koff": None if as_rt else _text(m.koff_text, m.koff_per_s, "rate1"),
             "residence_time": _residence_time_cell(m.koff_text, m.koff_per_s) if as_rt else None,
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


def export_tables(engine: Engine, out_dir: str | Path, xlsx: str | Path | None = None) -> dict[str, Any]:
    """Write ``<table>.csv`` for every table to ``out_dir`` (and a workbook to ``xlsx``); returns counts and paths."""
    out_dir = Path(out_dir)
    with UnitOfWork(engine, write=False) as uow:
        tables = collect_rows(uow.session)
    out_dir.mkdir(parents=True, exist_ok=True)
    summary: dict[str, Any] = {"dir": str(out_dir), "tables": {}}
    for name, rows in tables.items():
        path = out_dir / f"{name}.csv"
        n = write_csv(rows, SPECS[name].names, path)
        summary["tables"][name] = {"rows": n, "file": str(path)}
    if xlsx is not None:
        write_xlsx(tables, {name: SPECS[name].names for name in tables}, Path(xlsx))
        summary["xlsx"] = str(xlsx)
    return summary


__all__ = ["export_tables", "collect_rows"]
