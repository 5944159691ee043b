"""``krt fit METHOD FILE``: fit a raw kinetic time course or dose-response set.

CSV layout
----------
One row per reading, a header line naming the columns (case-insensitive;
other columns such as ``well`` are ignored).  A header may carry its unit,
``time (min)`` or ``concentration [nM]``, which overrides ``--time-unit`` /
``--conc-unit`` for that column.

``time``           time since the start (dissociation: since the chase/dilution;
                   jump dilution: since the dilution; washout: since the wash)
``signal``         the reading (binding, product, response), any linear scale
``concentration``  ligand (association), competitor (competition kinetics) or
                   agonist/inhibitor dose (ki-shift, insurmountability)
``curve``          label of the curve the row belongs to (optional)
``incubation``     ki-shift only: incubation time of the row's curve

Per method:

================== ======================= ==========================================
method             columns                 curves
================== ======================= ==========================================
dissociation       time, signal            optional ``curve``: replicates share koff
association        time, signal,           one curve per concentration; one curve
                   concentration           alone gives kobs (kon with ``--koff``)
competition-       time, signal,           one curve per competitor concentration,
kinetics           concentration           0 = tracer alone; needs ``--tracer-kon``,
                                           ``--tracer-koff``, ``--tracer-conc``
jump-dilution      time, signal (product)  ``curve`` ``control`` = uninhibited enzyme
washout-recovery   time, signal            ``curve`` ``control`` = untreated
ki-shift           concentration, signal,  one curve per incubation: an
                   incubation or curve     ``incubation`` column, or ``curve``
                                           labels that are times (``30 min``, ``4 h``)
insurmountability  concentration, signal,  ``curve`` ``control`` = agonist alone,
                   curve                   other labels = with antagonist
================== ======================= ==========================================

Errors name the file, line and column (``data.csv:7: time: not a number: 'x'``).
Fitted values support ranking and triage; they are not dosing advice.
"""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..domain import FIT_METHODS as METHODS
from ..errors import FitError, InputError, KrtError, UnitError
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..fmt import rate1 as fmt_rate1
from ..fmt import pct as fmt_pct
from ..fmt import rate2 as fmt_rate2
from ..units import parse_quantity, unit_factor

TIME_UNITS = ("s", "min", "h")
CONC_UNITS = ("M", "mM", "uM", "nM", "pM")
COLUMNS = {"time": "time", "signal": "signal", "concentration": "concentration", "curve": "curve", "incubation": "time"}
_HEADER = re.compile(r"^\s*([A-Za-z_]+)\s*(?:[\(\[]\s*([^\)\]]*?)\s*[\)\]])?\s*$")

# which options each method accepts (dest names)
_OPTIONS = {
    "tracer_kon": ("competition-kinetics",),
    "tracer_koff": ("competition-kinetics",),
    "tracer_conc": ("competition-kinetics", "ki-shift"),
    "tracer_kd": ("ki-shift",),
    "koff": ("association",),
    "post_dilution_conc": ("jump-dilution",),
    "kapp": ("jump-dilution",),
    "control_label": ("jump-dilution", "washout-recovery", "insurmountability"),
}


# ---------------------------------------------------------------- reading
def _read_rows(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    name = str(path)
    if not path.exists():
        raise InputError("file not found", file=name)
    if path.is_dir():
        raise InputError("is a directory, not a CSV file", file=name)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file (save the sheet as CSV)", file=name) from None
    except OSError as exc:
        raise InputError(f"cannot read file ({exc.strerror})", file=name) from None
    first = text.split("\n", 1)[0]
    delim = "\t" if "\t" in first and "," not in first else (";" if ";" in first and "," not in first else ",")
    reader = csv.reader(text.splitlines(), delimiter=delim)
    header, rows = None, []
    for cells in reader:
        if not any(c.strip() for c in cells):
            continue
        if header is None:
            header = cells
            continue
        rows.append((reader.line_num, cells))
    if header is None:
        raise InputError("file is empty", file=name)
    return header, rows


def _columns(header: list[str], name: str) -> dict[str, tuple[int, str | None]]:
    found: dict[str, tuple[int, str | None]] = {}
    for i, h in enumerate(header):
        m = _HEADER.match(h)
        if not m:
            continue
        col = m.group(1).lower()
        if col not in COLUMNS:
            continue
        if col in found:
            raise InputError(f"column {col!r} appears twice", file=name, line=1, column=col)
        found[col] = (i, m.group(2) or None)
    return found


def read_time_course(path, time_unit: str = "s", conc_unit: str = "M", *, required=("time", "signal")) -> pd.DataFrame:
    """Read and validate a fit CSV; return a DataFrame in SI units.

    Columns of the result: those present among ``time`` (s), ``signal``,
    ``concentration`` (M), ``curve`` (str), ``incubation`` (s), plus ``line``
    (the row's line in the file).  ``attrs['source']`` holds the path.
    Raises :class:`~tracker.errors.InputError` naming ``file:line: column``.
    """
    path = Path(path)
    name = str(path)
    header, rows = _read_rows(path)
    cols = _columns(header, name)
    for col in required:
        if col not in cols:
            have = ", ".join(h.strip() for h in header if h.strip()) or "none"
            raise InputError(f"missing column {col!r} (columns found: {have})", file=name, line=1, column=col)
    if not rows:
        raise InputError("no data rows below the header", file=name, line=2)
    factors = {}
    for col, (_, unit) in cols.items():
        kind = COLUMNS[col]
        if kind == "time":
            u = unit or time_unit
        elif kind == "concentration":
            u = unit or conc_unit
        else:
            continue
        try:
            factors[col] = unit_factor(u, kind)
        except UnitError as exc:
            raise InputError(str(exc), file=name, line=1, column=col) from None
    data: dict[str, list] = {c: [] for c in cols}
    lines = []
    width = len(header)
    for line, cells in rows:
        if len(cells) > width and any(c.strip() for c in cells[width:]):
            raise InputError(f"{len(cells)} fields but the header has {width}", file=name, line=line)
        for col, (i, _) in cols.items():
            raw = cells[i].strip() if i < len(cells) else ""
            if raw == "":
                raise InputError("empty cell", file=name, line=line, column=col)
            if col == "curve":
                data[col].append(raw)
                continue
            try:
                v = float(raw)
            except ValueError:
                raise InputError(f"not a number: {raw!r}", file=name, line=line, column=col) from None
            if not math.isfinite(v):
                raise InputError(f"not a finite number: {raw!r}", file=name, line=line, column=col)
            if col in ("time", "concentration") and v < 0:
                raise InputError(f"negative {col}: {raw}", file=name, line=line, column=col)
            if col == "incubation" and v <= 0:
                raise InputError(f"incubation must be positive: {raw}", file=name, line=line, column=col)
            data[col].append(v * factors.get(col, 1.0))
        lines.append(line)
    df = pd.DataFrame({c: (data[c] if c == "curve" else np.asarray(data[c], float)) for c in cols})
    df["line"] = np.asarray(lines, int)
    df.attrs["source"] = name
    return df


def read_dose_response(path, conc_unit: str = "M", time_unit: str = "s", *, need_incubation: bool = False,
                       need_curve: bool = False) -> pd.DataFrame:
    """Read a dose-response CSV (``concentration``, ``signal``); SI units.

    With ``need_incubation`` the incubation of each row comes from an
    ``incubation`` column or, failing that, from ``curve`` labels that are
    times (``30 min``; a bare number is in ``time_unit``).
    """
    req = ("concentration", "signal") + (("curve",) if need_curve else ())
    df = read_time_course(path, time_unit, conc_unit, required=req)
    name = str(path)
    if need_incubation and "incubation" not in df.columns:
        if "curve" not in df.columns:
            raise InputError("ki-shift needs an 'incubation' column or 'curve' labels that are times (e.g. '30 min')",
                             file=name, line=1, column="incubation")
        inc = []
        for label, line in zip(df["curve"], df["line"]):
            try:
                inc.append(parse_quantity(label, "time", default_unit=time_unit).si)
            except UnitError as exc:
                raise InputError(f"curve label {label!r} is not an incubation time ({exc})", file=name,
                                 line=int(line), column="curve") from None
        df["incubation"] = np.asarray(inc, float)
    return df


def _check_curves(df: pd.DataFrame, name: str):
    """Each curve must have one concentration."""
    if "curve" in df.columns and "concentration" in df.columns:
        seen: dict[str, tuple[float, int]] = {}
        for label, c, line in zip(df["curve"], df["concentration"], df["line"]):
            if label in seen and not math.isclose(seen[label][0], c, rel_tol=1e-9, abs_tol=0.0):
                raise InputError(f"curve {label!r} has a second concentration ({c:.4g} M; line {seen[label][1]} has "
                                 f"{seen[label][0]:.4g} M)", file=name, line=int(line), column="concentration")
            seen.setdefault(label, (c, int(line)))


# ---------------------------------------------------------------- command
_EPILOG = """CSV columns (header names, case-insensitive; 'time (min)' sets a column's unit):
  dissociation          time, signal [, curve]            replicate curves share koff
  association           time, signal, concentration [, curve]
                        one curve gives kobs (kon with --koff); several concentrations a global fit
  competition-kinetics  time, signal, concentration (competitor; 0 = tracer alone) [, curve]
                        needs --tracer-kon, --tracer-koff, --tracer-conc
  jump-dilution         time, signal (product), curve     curve 'control' = uninhibited enzyme
  washout-recovery      time, signal, curve               curve 'control' = untreated
  ki-shift              concentration, signal, incubation (or curve labels such as '30 min', '4 h')
  insurmountability     concentration (agonist), signal, curve   curve 'control' = agonist alone
"""


def register(subparsers) -> None:
    import argparse

    p = subparsers.add_parser(
        "fit",
        help="fit a kinetic time course or dose-response set (koff, kon, residence time, Ki shift ...)",
        description="Fit raw kinetic data from a CSV file. Quantities take units, e.g. --tracer-kon '3e6 /M/s'. "
        "Estimates support ranking and triage; they are not dosing advice.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("method", choices=METHODS, metavar="METHOD", help="one of: " + ", ".join(METHODS))
    p.add_argument("file", metavar="FILE", help="CSV file (column layout below)")
    p.add_argument("--time-unit", choices=TIME_UNITS, default="s", help="unit of the time/incubation columns (default s)")
    p.add_argument("--conc-unit", choices=CONC_UNITS, default="M", help="unit of the concentration column (default M)")
    p.add_argument("--tracer-kon", metavar="Q", help="tracer kon, e.g. '3e6 /M/s' (competition-kinetics)")
    p.add_argument("--tracer-koff", metavar="Q", help="tracer koff, e.g. '0.01 /s' (competition-kinetics)")
    p.add_argument("--tracer-conc", metavar="Q", help="tracer concentration, e.g. '1 nM' (competition-kinetics, ki-shift)")
    p.add_argument("--tracer-kd", metavar="Q", help="tracer KD for Cheng-Prusoff, e.g. '2 nM' (ki-shift)")
    p.add_argument("--koff", metavar="Q", help="known koff, e.g. '1e-3 /s' (association at one concentration gives kon)")
    p.add_argument("--post-dilution-conc", metavar="Q", help="inhibitor left after the dilution (jump-dilution correction)")
    p.add_argument("--kapp", metavar="Q", help="apparent Ki under assay conditions (jump-dilution correction)")
    p.add_argument("--control-label", metavar="LABEL", help="curve label of the control trace (default 'control')")
    p.add_argument("--json", action="store_true", help="print the result as JSON (SI units)")
    p.add_argument("--save", metavar="COMPOUND", help="store the fit and its raw data for COMPOUND")
    p.set_defaults(func=run)


def _options(args) -> dict:
    kinds = {
        "tracer_kon": "rate2", "tracer_koff": "rate1", "tracer_conc": "concentration", "tracer_kd": "concentration",
        "koff": "rate1", "post_dilution_conc": "concentration", "kapp": "concentration",
    }
    out = {}
    for dest, methods in _OPTIONS.items():
        val = getattr(args, dest, None)
        if val is None:
            continue
        flag = "--" + dest.replace("_", "-")
        if args.method not in methods:
            raise KrtError(f"{flag} does not apply to {args.method} (it is used by {', '.join(methods)})")
        if dest == "control_label":
            out[dest] = val
            continue
        try:
            out[dest] = parse_quantity(val, kinds[dest], positive=dest != "post_dilution_conc").si
        except UnitError as exc:
            raise UnitError(f"{flag}: {exc}") from None
    if args.method == "competition-kinetics":
        missing = [f"--tracer-{n}" for n in ("kon", "koff", "conc") if f"tracer_{n}" not in out]
        if missing:
            raise KrtError(f"competition-kinetics needs {', '.join(missing)} (the tracer's own kinetics)")
    if ("tracer_conc" in out) != ("tracer_kd" in out) and args.method == "ki-shift":
        raise KrtError("Cheng-Prusoff needs both --tracer-conc and --tracer-kd")
    if ("post_dilution_conc" in out) != ("kapp" in out):
        raise KrtError("the jump-dilution correction needs both --post-dilution-conc and --kapp")
    return out


def _load(args):
    if args.method in ("ki-shift", "insurmountability"):
        return read_dose_response(args.file, args.conc_unit, args.time_unit,
                                  need_incubation=args.method == "ki-shift",
                                  need_curve=args.method == "insurmountability")
    required = ("time", "signal") + (("concentration",) if args.method == "competition-kinetics" else ())
    return read_time_course(args.file, args.time_unit, args.conc_unit, required=required)


def run(args) -> int:
    from ..kinetics.fitting import fit_table

    save_fit = None
    if args.save:
        try:
            from ..services.fits import save_fit  # noqa: F811  (wired by the database layer)
        except ImportError as exc:
            detail = "" if getattr(exc, "name", None) == "tracker.services.fits" else f" ({exc})"
            raise KrtError(f"saving fits needs the database layer{detail}") from None
    opts = _options(args)
    df = _load(args)
    if args.method in ("association", "competition-kinetics"):
        _check_curves(df, args.file)
    try:
        result = fit_table(args.method, df, **opts)
    except FitError as exc:
        raise FitError(f"{args.file}: {exc}") from None
    if not result.success:
        raise FitError(f"{args.file}: the {args.method} fit did not converge")
    saved = None
    if save_fit is not None:
        raw_options = {k: getattr(args, k) for k in _OPTIONS if getattr(args, k, None) is not None}
        saved = save_fit(args.save, result, df, args.file,
                         units={"time": args.time_unit, "concentration": args.conc_unit}, options=raw_options)
    if args.json:
        out = result.to_json_keys()
        if saved is not None:
            out["saved"] = {"compound": args.save, **(saved if isinstance(saved, dict) else {})}
        print(json.dumps(out, indent=2, allow_nan=False, default=str))
    else:
        print(format_report(result, args.file))
        if saved is not None:
            detail = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in saved.items()) if isinstance(saved, dict) else ""
            print(f"  saved for {args.save}" + (f" ({detail})" if detail else ""))
    return 0


# ---------------------------------------------------------------- report
def _fmt(name: str, v: float) -> str:
    base = name.split("[", 1)[0]
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "n/a"
    if base in ("koff", "kobs", "k_fast", "k_slow"):
        return fmt_rate1(v)
    if base == "kon":
        return fmt_rate2(v)
    if base in ("kd", "ki", "ic50", "ec50"):
        return fmt_conc(v)
    if base in ("residence_time", "half_life", "residence_time_lower_bound"):
        return fmt_time(v)
    if base in ("fraction", "max_response_fraction"):
        return fmt_pct(v)
    return f"{v:.4g}"


_HEADLINE = (
    ("kobs", "kobs"),
    ("koff", "koff"),
    ("kon", "kon"),
    ("kd", "KD (koff/kon)"),
    ("residence_time", "residence time"),
    ("residence_time_lower_bound", "residence time ≥"),
    ("half_life", "half-life"),
    ("ki_shift_ratio", "Ki-shift ratio"),
    ("ki", "Ki (longest incubation)"),
    ("max_response_fraction", "max response left"),
)


def format_report(result, source: str = "") -> str:
    """A short human-readable report of a :class:`~tracker.kinetics.fitting.FitResult`."""
    e, ci = result.estimates, result.ci95
    lines = [f"{result.method} fit of {source}" if source else f"{result.method} fit"]
    labels = result.curve_labels
    lines.append(f"  curves: {', '.join(labels)}" if len(labels) <= 8 else f"  curves: {len(labels)}")
    shown = set()

    def row(name, label):
        if name not in e:
            return
        shown.add(name)
        text = f"  {label:<24} {_fmt(name, e[name]):>14}"
        if name in ci:
            lo, hi = ci[name]
            kind = result.ci_kinds.get(name, "")
            text += f"   95% CI {_fmt(name, lo)} – {_fmt(name, hi)}" + (f" ({kind})" if kind else "")
        elif name in ("koff", "residence_time", "half_life") and result.method == "association" and "kobs" in e:
            text += "   (given)"
        lines.append(text)

    for name, label in _HEADLINE:
        row(name, label)
    for name in e:
        base = name.split("[", 1)[0]
        if name not in shown and base in ("ic50", "ki", "fraction", "dose_ratio"):
            row(name, name)
    line = result.extras.get("kobs_line") if isinstance(result.extras, dict) else None
    if line and line.get("slope") is not None:
        lines.append(f"  kobs-vs-concentration line (cross-check): slope {_fmt('kon', line['slope'])}, "
                     f"intercept {_fmt('koff', line['intercept'])}")
    lines.append(
        f"  fit: R² {result.r_squared:.4f}, residual SD {result.residual_sd:.3g}, AIC {result.aic:.1f}, "
        f"{result.n_points} points, {result.n_params} parameters, intervals: {result.ci_kind}"
    )
    if result.warnings:
        lines.append("  warnings:")
        for code, msg in result.warnings:
            lines.append(f"    [{code}] {msg}")
    lines.append("  Estimates support ranking and triage, not dosing decisions; defer to qualified pharmacologists.")
    return "\n".join(lines)
