"""``krt fit METHOD FILE``: fit a raw kinetic time course or dose-response set.

The file is read by :func:`tracker.io.timecourse.read_time_course` (the same
reading layer and error format as ``krt import``; column layouts, the plate
layout with ``--well-map`` and the replicate rules are described there).  Every
``time``/``incubation``/``concentration`` column needs a unit, in its header
(``time (min)``) or from ``--time-unit`` / ``--conc-unit``.

Errors name the file, line and column (``data.csv:7: time: not a number: 'x'``).
Fitted values support ranking and triage; they are not dosing advice.
"""

from __future__ import annotations

import json
import math

from ..domain import FIT_METHODS as METHODS
from ..errors import KrtError
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..fmt import pct as fmt_pct
from ..fmt import rate1 as fmt_rate1
from ..fmt import rate2 as fmt_rate2
from ..io.timecourse import CONC_UNITS, TIME_UNITS

# ---------------------------------------------------------------- command
_EPILOG = """CSV columns (comma-separated, header names case-insensitive). Units are required: in the header,
'time (min)', 'concentration (nM)', or from --time-unit / --conc-unit; nothing is assumed.
  dissociation          time, signal [, curve]            replicate curves share koff
  association           time, signal, concentration [, curve]
                        one curve gives kobs (kon with --koff); several concentrations a global fit
  competition-kinetics  time, signal, concentration (competitor; 0 = tracer alone) [, curve]
                        needs --tracer-kon, --tracer-koff, --tracer-conc
  jump-dilution         time, signal (product), curve     curve 'control' = uninhibited enzyme
  washout-recovery      time, signal, curve               curve 'control' = untreated
  ki-shift              concentration, signal, incubation (or curve labels such as '30 min', '4 h')
  insurmountability     concentration (agonist), signal, curve   curve 'control' = agonist alone
  morrison              concentration (inhibitor), signal (enzyme activity); needs --enzyme-conc
Replicates: a 'replicate' column (with or without 'curve'); time-course replicates are fitted jointly
as curves that share the rate constants, each with its own amplitude and baseline.
Plate layout: a time column and one column per well (A1, B12 ...), with --well-map FILE, a CSV with
columns well, concentration (unit in the header or the cells), curve.
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
    p.add_argument("--time-unit", choices=TIME_UNITS, default=None,
                   help="unit of time/incubation columns whose header names none (no default: a unit is required)")
    p.add_argument("--conc-unit", choices=CONC_UNITS, default=None,
                   help="unit of concentration columns whose header names none (no default: a unit is required)")
    p.add_argument("--well-map", metavar="FILE",
                   help="plate layout: CSV with columns well, concentration, curve for a file of one column per well")
    from ..services.fitoptions import FIT_OPTIONS, WEIGHTS

    for dest, (kind, methods, text) in FIT_OPTIONS.items():
        where = "every method" if len(methods) == len(METHODS) else ", ".join(methods)
        if kind == "choice":
            p.add_argument("--weights", choices=list(WEIGHTS), default=None, metavar="|".join(WEIGHTS),
                           help=f"{text}. Default none ({where})".replace("%", "%%"))
            continue
        metavar = "LO,HI" if kind.startswith("interval:") else ("LABEL" if kind == "text" else "Q")
        p.add_argument("--" + dest.replace("_", "-"), metavar=metavar, default=None,
                       help=f"{text} ({where})".replace("%", "%%"))
    p.add_argument("--json", action="store_true", help="print the result as JSON (SI units)")
    p.add_argument("--save", metavar="COMPOUND", help="store the fit and its raw data for COMPOUND (a scientist or lead; "
                   "refused when the residence time is more than 3x from one already stored)")
    p.add_argument("--supersede", metavar="REASON",
                   help="with --save: store even when a stored residence time differs more than 3x, marking the older "
                   "value superseded (kept on record) and auditing REASON")
    p.add_argument("--by", metavar="USER", default=None,
                   help="with --save: must match the signed-in user (krt login); scientists and leads save")
    p.set_defaults(func=run)


def _options(args) -> dict:
    from ..services.fitoptions import FIT_OPTIONS, fit_options

    return fit_options(args.method, {dest: getattr(args, dest, None) for dest in FIT_OPTIONS})


def _load(args):
    from ..io.timecourse import read_time_course

    return read_time_course(args.file, args.method, time_unit=args.time_unit, conc_unit=args.conc_unit,
                            well_map=args.well_map, control_label=args.control_label)


def run(args) -> int:
    from ..services.fits import fit_time_course

    if args.supersede is not None and not args.save:
        raise KrtError("--supersede goes with --save COMPOUND")
    if args.by is not None and not args.save:
        raise KrtError("--by goes with --save COMPOUND")
    opts = _options(args)
    df = _load(args)
    result = fit_time_course(args.method, df, source=args.file, **opts)
    saved = None
    if args.save:
        saved = _save(args, result, df)
    if args.json:
        out = result.to_json_keys()
        if saved is not None:
            out["saved"] = saved
        print(json.dumps(out, indent=2, allow_nan=False, default=str))
    else:
        print(format_report(result, args.file))
        if saved is not None:
            print(format_saved(saved))
    return 0


def _save(args, result, df) -> dict:
    from ..db import migrate
    from ..db.session import database_errors, open_engine
    from ..services.fits import FIT_OPTIONS, save_fit
    from .signin import signed_in_user

    raw_options = {k: getattr(args, k) for k in FIT_OPTIONS if getattr(args, k, None) is not None}
    engine = open_engine()
    try:
        with database_errors("saving the fit failed"):
            migrate.require_current(engine)
            return save_fit(args.save, result, df, args.file, engine=engine, actor=signed_in_user(engine, args.by),
                            units=df.attrs.get("units", {}), options=raw_options, supersede=args.supersede)
    finally:
        engine.dispose()


def format_saved(saved: dict) -> str:
    """What a save stored, in units (the service's wording, indented under the report)."""
    from ..services.fits import describe_saved

    return "\n".join("  " + line for line in describe_saved(saved).splitlines())


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
