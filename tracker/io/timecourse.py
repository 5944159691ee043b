"""Raw kinetic time courses and dose-response sets: the reader behind ``krt fit``, the demo and the dashboard.

Files go through the same reading layer as ``krt import`` (:mod:`.reading`):
comma-separated UTF-8 CSV (or a one-sheet ``.xlsx``), ``;`` or tab separated
files refused with the same message, every problem reported as
``file:line: column: message``.

Units are never guessed.  A ``time``, ``incubation`` or ``concentration``
column carries its unit in the header (``time (min)``, ``concentration [nM]``)
or gets one from the caller (``--time-unit`` / ``--conc-unit``); a column with
neither is refused.  A header unit that contradicts the given one is refused
too.

Long layout (one row per reading)
---------------------------------
``time``           time since the start of the phase that is fitted
``signal``         the reading, any linear scale
``concentration``  ligand, competitor or inhibitor/agonist concentration
``curve``          label of the curve the row belongs to
``replicate``      label of the replicate within a curve
``incubation``     ki-shift only: incubation time of the row's curve

Other columns (``well``, ``note`` ...) are ignored.

Wide (plate-reader) layout
--------------------------
A ``time`` column and one column per well (``A1``, ``B07`` ..., or any names
when a well map is given).  The well map (CSV with columns ``well``,
``concentration``, ``curve``; either of the last two may be missing) gives each
well its concentration and curve.  Without a map each well is its own curve.

Replicates
----------
Rows of one curve that carry different ``replicate`` labels, and wells that
the map gives the same curve (their ``replicate`` is the well), are
replicates.  The reader passes the ``replicate`` column on; the fit
(:func:`tracker.kinetics.fit_table`) fits them jointly.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Union

import numpy as np
import pandas as pd

from ..errors import InputError, UnitError
from ..units import parse_quantity, unit_factor
from .reading import RawTable, read_csv, read_csv_bytes, read_xlsx

__all__ = [
    "TIME_UNITS",
    "CONC_UNITS",
    "DOSE_RESPONSE_METHODS",
    "WellMap",
    "read_time_course",
    "read_well_map",
    "plate_wells",
    "check_curves",
]

TIME_UNITS = ("s", "min", "h")
CONC_UNITS = ("M", "mM", "uM", "nM", "pM")
TABLE = "time course"
#: methods whose x axis is a concentration, not a time
DOSE_RESPONSE_METHODS = ("ki-shift", "insurmountability", "morrison")
_KINDS = {"time": "time", "incubation": "time", "concentration": "concentration"}
_HEADER = re.compile(r"^\s*([A-Za-z_]+)\s*(?:[\(\[]\s*([^\)\]]*?)\s*[\)\]])?\s*$")
_WELL = re.compile(r"^[A-Za-z]{1,2}0*\d{1,3}$")
#: a path, or ``(file name, bytes)`` of an upload
Source = Union[str, Path, tuple[str, bytes]]


def _columns_for(method: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(required, optional) columns of ``method`` in the long layout."""
    if method == "ki-shift":
        return ("concentration", "signal"), ("curve", "replicate", "incubation")
    if method == "insurmountability":
        return ("concentration", "signal", "curve"), ("replicate",)
    if method in DOSE_RESPONSE_METHODS:
        return ("concentration", "signal"), ("curve", "replicate")
    if method == "competition-kinetics":
        return ("time", "signal", "concentration"), ("curve", "replicate")
    if method == "association":
        return ("time", "signal"), ("concentration", "curve", "replicate")
    return ("time", "signal"), ("curve", "replicate")


@dataclass(frozen=True)
class WellMap:
    """Well -> (concentration in M or NaN, curve label or None), from a CSV file or the dashboard's editor."""

    label: str
    wells: dict[str, tuple[float, str | None]]
    lines: dict[str, int]


# ------------------------------------------------------------------ raw tables
def _raw(source: Source, label: str | None) -> RawTable:
    """Read a path (CSV or XLSX) or ``(name, bytes)`` of an upload through the import's reading layer."""
    if isinstance(source, tuple):
        name, data = source
        raw = read_csv_bytes(data, TABLE, label or str(name), Path(str(name)).name)
    else:
        path = Path(source)
        name = label or str(path)
        if not path.exists():
            raise InputError("file not found", file=name)
        if path.is_dir():
            raise InputError("is a folder, not a CSV file", file=name)
        if path.suffix.lower() == ".xlsx":
            raw = read_xlsx(path, only_table=TABLE, label=name)[0]
        else:
            raw = read_csv(path, TABLE, name)
    if raw.errors:
        raise raw.errors[0]
    if raw.cells.empty and not list(raw.cells.columns):
        raise raw.error(1, None, "file is empty; expected a header line")
    return raw


def _parse_header(raw: RawTable) -> dict[str, tuple[str, str | None]]:
    """Known columns: name -> (column in ``raw.cells``, unit written in the header or None)."""
    found: dict[str, tuple[str, str | None]] = {}
    for col in raw.cells.columns:
        m = _HEADER.match(raw.original(col))
        if not m:
            continue
        name = m.group(1).lower()
        if name not in ("time", "signal", "concentration", "curve", "replicate", "incubation"):
            continue
        if name in found:
            raise raw.error(raw.header_line, name, f"column {name!r} appears twice")
        found[name] = (col, m.group(2) or None)
    return found


def _factor(raw: RawTable, name: str, header_unit: str | None, given: str | None) -> float:
    kind = _KINDS[name]
    flag = "--time-unit" if kind == "time" else "--conc-unit"
    example = "time (min)" if kind == "time" else "concentration (nM)"
    if name == "incubation":
        example = "incubation (h)"
    if not header_unit and not given:
        raise raw.error(raw.header_line, name, f"a unit is needed: write it in the header, e.g. '{example}', "
                                               f"or give the {kind} unit ({flag})")
    try:
        f = unit_factor(header_unit or given or "", kind)
        if header_unit and given and not math.isclose(unit_factor(given, kind), f):
            raise raw.error(raw.header_line, name, f"the header says {header_unit!r} but the {kind} unit given is "
                                                   f"{given!r}; give one unit")
    except UnitError as exc:
        raise raw.error(raw.header_line, name, str(exc)) from None
    return f


def _numbers(raw: RawTable, col: str, name: str, *, allow_empty: bool = False) -> np.ndarray:
    texts = raw.cells[col]
    values = pd.to_numeric(texts, errors="coerce").to_numpy(float)
    for pos in np.flatnonzero(~np.isfinite(values)):
        t = texts.iloc[pos]
        if t is None:
            if allow_empty:
                continue
            raise raw.error(raw.lines[pos], name, "empty cell")
        try:
            float(t)
        except ValueError:
            raise raw.error(raw.lines[pos], name, f"not a number: {t!r}") from None
        raise raw.error(raw.lines[pos], name, f"not a finite number: {t!r}")
    return values


def _checked(raw: RawTable, values: np.ndarray, name: str, texts: pd.Series | None, lines: list[int]) -> None:
    if name in ("time", "concentration"):
        bad = np.flatnonzero(values < 0)
        if bad.size:
            i = int(bad[0])
            shown = texts.iloc[i] if texts is not None else f"{values[i]:g}"
            raise raw.error(lines[i], name, f"negative {name}: {shown}")
    if name == "incubation":
        bad = np.flatnonzero(~(values > 0))
        if bad.size:
            i = int(bad[0])
            raise raw.error(lines[i], name, f"incubation must be positive: {texts.iloc[i] if texts is not None else values[i]}")


# ------------------------------------------------------------------ well map
def read_well_map(source: Source | pd.DataFrame, conc_unit: str | None = None, *, label: str | None = None) -> WellMap:
    """Read a well map: a CSV path, ``(name, bytes)``, or a DataFrame with columns well, concentration, curve.

    Concentrations take the unit of the header (``concentration (nM)``), of
    the cell (``10 nM``) or ``conc_unit``; zero is allowed (tracer alone, control).
    """
    if isinstance(source, pd.DataFrame):
        label = label or "well map"
        frame = source.copy()
        frame.columns = [str(c).strip() for c in frame.columns]
        cells = pd.DataFrame({c.lower(): [None if v is None or (isinstance(v, float) and math.isnan(v)) or not str(v).strip()
                                          else str(v).strip() for v in frame[c]] for c in frame.columns}, dtype=object)
        raw = RawTable(TABLE, label, label, cells, list(range(2, len(cells) + 2)),
                       header_text={c.lower(): c for c in frame.columns})
        keep = [i for i in range(len(cells)) if any(v is not None for v in cells.iloc[i])]
        raw.cells = cells.iloc[keep].reset_index(drop=True)
        raw.lines = [raw.lines[i] for i in keep]
    else:
        raw = _raw(source, label)
    cols: dict[str, tuple[str, str | None]] = {}
    for col in raw.cells.columns:
        m = _HEADER.match(raw.original(col))
        if m and m.group(1).lower() in ("well", "concentration", "curve"):
            cols[m.group(1).lower()] = (col, m.group(2) or None)
    if "well" not in cols:
        raise raw.error(raw.header_line, "well", "missing column 'well' (the well map needs well, concentration and/or curve)")
    if "concentration" not in cols and "curve" not in cols:
        raise raw.error(raw.header_line, None, "the well map needs a 'concentration' or a 'curve' column")
    unit = None
    if "concentration" in cols:
        header_unit = cols["concentration"][1]
        if header_unit:
            _factor(raw, "concentration", header_unit, conc_unit)
        unit = header_unit or conc_unit
    wells: dict[str, tuple[float, str | None]] = {}
    lines: dict[str, int] = {}
    for pos, line in enumerate(raw.lines):
        well = raw.cells[cols["well"][0]].iloc[pos]
        if well is None:
            raise raw.error(line, "well", "empty cell")
        key = well.strip().upper()
        if key in wells:
            raise raw.error(line, "well", f"well {well!r} appears twice (first on line {lines[key]})")
        conc = math.nan
        if "concentration" in cols:
            text = raw.cells[cols["concentration"][0]].iloc[pos]
            if text is not None:
                try:
                    conc = parse_quantity(text, "concentration", positive=False, default_unit=unit).si
                except UnitError as exc:
                    msg = str(exc)
                    if "missing unit" in msg:
                        msg = ("a unit is needed: write it in the header, e.g. 'concentration (nM)', in the cell "
                               "('10 nM'), or give the concentration unit (--conc-unit)")
                    raise raw.error(line, "concentration", msg) from None
                if conc < 0:
                    raise raw.error(line, "concentration", f"negative concentration: {text}")
        curve = raw.cells[cols["curve"][0]].iloc[pos] if "curve" in cols else None
        wells[key] = (conc, curve)
        lines[key] = line
    if not wells:
        raise raw.error(raw.header_line + 1, None, "the well map has no rows")
    return WellMap(raw.label, wells, lines)


def plate_wells(content: bytes, label: str = "upload") -> list[str]:
    """The well columns of a plate-layout CSV (every named column but ``time``), as written; for a map editor."""
    raw = _raw((label, content), label)
    header = _parse_header(raw)
    tcol = header["time"][0] if "time" in header else None
    return [raw.original(c) for c in raw.cells.columns if c != tcol]


def _well_key(name: str) -> str:
    return name.strip().upper()


def _wide(raw: RawTable, method: str, header: dict[str, tuple[str, str | None]], tfac: float, wmap: WellMap | None) -> pd.DataFrame:
    """Melt a plate-reader layout (time + one column per well) into the long layout."""
    tcol = header["time"][0]
    wells = [c for c in raw.cells.columns if c != tcol]
    if not wells:
        raise raw.error(raw.header_line, "signal", "missing column 'signal' (or well columns of a plate layout)")
    time = _numbers(raw, tcol, "time") * tfac
    _checked(raw, time, "time", raw.cells[tcol], raw.lines)
    if wmap is not None:
        in_data = {_well_key(raw.original(w)) for w in wells}
        for w in wells:
            if _well_key(raw.original(w)) not in wmap.wells:
                raise raw.error(raw.header_line, raw.original(w), f"well {raw.original(w)!r} is not in the well map ({wmap.label})")
        for key, line in wmap.lines.items():
            if key not in in_data:
                raise InputError(f"well {key!r} is not a column of {raw.label}", file=wmap.label, line=line, column="well")
    parts = []
    for w in wells:
        name = raw.original(w)
        sig = _numbers(raw, w, name, allow_empty=True)
        ok = np.isfinite(sig)
        if not ok.any():
            raise raw.error(raw.header_line, name, "the well has no readings")
        conc, curve = (math.nan, None) if wmap is None else wmap.wells[_well_key(name)]
        part = pd.DataFrame({"time": time[ok], "signal": sig[ok], "line": np.asarray(raw.lines, int)[ok]})
        if wmap is not None and not math.isnan(conc):
            part["concentration"] = conc
        part["curve"] = curve if curve is not None else name
        if curve is not None:
            part["replicate"] = name
        parts.append(part)
    df = pd.concat(parts, ignore_index=True)
    if "concentration" in df and df["concentration"].isna().any():
        bad = df.loc[df["concentration"].isna(), "curve"].iloc[0]
        raise InputError(f"a well of curve {bad!r} has no concentration", file=wmap.label if wmap else raw.label,
                         column="concentration")
    return df


# ------------------------------------------------------------------ the reader
def read_time_course(
    source: Source,
    method: str,
    *,
    time_unit: str | None = None,
    conc_unit: str | None = None,
    well_map: Source | pd.DataFrame | WellMap | None = None,
    control_label: str | None = None,
    label: str | None = None,
) -> pd.DataFrame:
    """Read, check and convert a time course (or dose-response set) for ``method``; SI units out.

    ``source`` is a path (CSV, or XLSX with one sheet) or ``(file name, bytes)``
    of an upload.  ``well_map`` (path, ``(name, bytes)``, DataFrame or
    :class:`WellMap`) switches on the plate layout.  Columns of the result:
    ``time`` (s), ``signal``, ``concentration`` (M), ``curve`` (str),
    ``replicate`` (str), ``incubation`` (s), ``line`` (the reading's line in the file) as the method
    uses them; ``attrs['source']`` is the file's label, ``attrs['layout']``
    ``'long'`` or ``'wide'``, ``attrs['units']`` the unit each column was read in.  Raises :class:`~tracker.errors.InputError`
    (``file:line: column: message``).
    """
    raw = _raw(source, label)
    name = raw.label
    header = _parse_header(raw)
    units: dict[str, str | None] = {}
    required, optional = _columns_for(method)
    if raw.cells.empty:
        raise raw.error(raw.header_line + 1, None, "no data rows below the header")
    if isinstance(well_map, WellMap) or well_map is None:
        wmap = well_map
    else:
        wmap = read_well_map(well_map, conc_unit)
    others = [c for c in raw.cells.columns if c not in {v[0] for v in header.values()}]
    wide = "signal" not in header and "time" in header and others and (
        wmap is not None or all(_WELL.match(raw.original(c)) for c in others))
    if wmap is not None and not wide:
        raise raw.error(raw.header_line, "signal", "a well map goes with the plate layout (a time column and one column "
                                                   "per well), but this file has a signal column")
    if wide:
        if method in DOSE_RESPONSE_METHODS:
            raise raw.error(raw.header_line, "time", f"the plate layout is for time courses; {method} needs the long "
                                                     "layout (concentration, signal, curve)")
        tfac = _factor(raw, "time", header["time"][1], time_unit)
        units["time"] = header["time"][1] or time_unit
        df = _wide(raw, method, header, tfac, wmap)
        if "concentration" in df:
            units["concentration"] = f"as in {wmap.label}" if wmap is not None else ""
        if "concentration" in required and "concentration" not in df:
            raise InputError(f"{method} needs a concentration per well: give a well map with a concentration column",
                             file=name, line=raw.header_line, column="concentration")
        df.attrs["layout"] = "wide"
    else:
        for col in required:
            if col not in header:
                have = ", ".join(raw.original(c) for c in raw.cells.columns) or "none"
                raise raw.error(raw.header_line, col, f"missing column {col!r} (columns found: {have})")
        use = [c for c in required + optional if c in header]
        factors = {}  # units first: a header without one is refused before any cell is read
        for col in use:
            if col in _KINDS:
                given = time_unit if _KINDS[col] == "time" else conc_unit
                factors[col] = _factor(raw, col, header[col][1], given)
                units[col] = header[col][1] or given
        data: dict[str, object] = {}
        lines = raw.lines
        for col in use:
            src = header[col][0]
            texts = raw.cells[src]
            if col in ("curve", "replicate"):
                empty = [i for i, v in enumerate(texts) if v is None]
                if empty:
                    raise raw.error(lines[empty[0]], col, "empty cell")
                data[col] = texts.astype(str).to_numpy(object)
                continue
            values = _numbers(raw, src, col)
            _checked(raw, values, col, texts, lines)
            if col in factors:
                values = values * factors[col]
            data[col] = values
        df = pd.DataFrame(data)
        df["line"] = np.asarray(lines, int)
        df.attrs["layout"] = "long"
    df.attrs["source"] = name
    df.attrs["units"] = {k: v for k, v in units.items() if v}
    if method == "ki-shift" and "incubation" not in df:
        _incubation_from_labels(df, name, time_unit)
    if method not in DOSE_RESPONSE_METHODS:
        check_curves(df, name)
    return df


def _incubation_from_labels(df: pd.DataFrame, name: str, time_unit: str | None) -> None:
    if "curve" not in df:
        raise InputError("ki-shift needs an 'incubation' column or 'curve' labels that are times (e.g. '30 min')",
                         file=name, line=1, column="incubation")
    parsed: dict[str, float] = {}
    inc = np.empty(len(df))
    for i, (label, line) in enumerate(zip(df["curve"], df["line"])):
        if label not in parsed:
            try:
                parsed[label] = parse_quantity(label, "time", default_unit=time_unit).si
            except UnitError as exc:
                msg = str(exc)
                if "missing unit" in msg:
                    msg = "a unit is needed: write it in the label ('30 min') or give the time unit (--time-unit)"
                raise InputError(f"curve label {label!r} is not an incubation time ({msg})", file=name,
                                 line=int(line), column="curve") from None
        inc[i] = parsed[label]
    df["incubation"] = inc


def check_curves(df: pd.DataFrame, name: str) -> None:
    """Each curve has one concentration (a second one is a typing slip, reported at its line)."""
    if "curve" not in df or "concentration" not in df:
        return
    seen: dict[str, tuple[float, int]] = {}
    for label, c, line in zip(df["curve"], df["concentration"], df["line"]):
        if label in seen and not math.isclose(seen[label][0], c, rel_tol=1e-9, abs_tol=0.0):
            raise InputError(f"curve {label!r} has a second concentration ({c:.4g} M; line {seen[label][1]} has "
                             f"{seen[label][0]:.4g} M)", file=name, line=int(line), column="concentration")
        seen.setdefault(label, (c, int(line)))
