"""``krt simulate``: apparent affinity after finite incubation, engagement under PK,
and residence-time bounds from a Ki shift.

Thin translator: quantities are parsed with units at the boundary
(:func:`tracker.units.parse_quantity`), the pure functions in
:mod:`tracker.kinetics` do the work, and the result is printed as a short
report or as JSON (``--json``; undefined values are ``null``).

    krt simulate apparent-affinity --kd "1 nM" --residence-time "6 h" --incubation "10 min"
    krt simulate engagement --kd "1 nM" --residence-time "6 h" --route oral \\
        --free-cmax "2 nM" --tmax "30 min" --half-life "2 h" --threshold 0.3
    krt simulate ki-shift-bounds --ratio 4 --short-incubation "10 min" \\
        --long-incubation "3 h" --ki "1 nM"
"""

from __future__ import annotations

import json
import math

from ..errors import InputError, KrtError
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..fmt import rate1, rate2
from ..units import parse_quantity

CAUTION = (
    "Caution: simulations are decision support, not dosing advice; an underestimated affinity can mean "
    "unexpected target coverage and mechanism-based toxicity. Defer to qualified pharmacologists and your SOPs."
)


# ----------------------------------------------------------------------------- helpers
def _quantity(args, attr, kind):
    text = getattr(args, attr)
    if text is None:
        return None
    option = "--" + attr.replace("_", "-")
    try:
        return parse_quantity(text, kind).si
    except KrtError as exc:
        raise type(exc)(f"{option}: {exc.one_line()}") from None


def _compound(args, prefix=""):
    """(kd, kon, koff) from any two of --kd/--kon/--koff/--residence-time (with a prefix for the tracer)."""
    from ..services.simulation import rate_constants

    p = prefix.replace("-", "_")
    vals = dict(
        kd=_quantity(args, f"{p}kd", "concentration"),
        kon=_quantity(args, f"{p}kon", "rate2"),
        koff=_quantity(args, f"{p}koff", "rate1"),
        residence_time=_quantity(args, f"{p}residence_time", "time"),
    )
    who = "the tracer" if prefix else "the compound"
    try:
        kd, kon, koff = rate_constants(**vals)
    except InputError as exc:
        opts = ", ".join(f"--{prefix}{o}" for o in ("kd", "kon", "koff", "residence-time"))
        raise InputError(f"{who}: {exc.one_line()} ({opts})") from None
    return float(kd), float(kon), float(koff)


def _add_compound_options(p, prefix="", what="compound"):
    p.add_argument(f"--{prefix}kd", metavar="Q", help=f"{what} KD, e.g. '1 nM'")
    p.add_argument(f"--{prefix}kon", metavar="Q", help=f"{what} kon, e.g. '1e6 /M/s'")
    p.add_argument(f"--{prefix}koff", metavar="Q", help=f"{what} koff, e.g. '1e-3 /s'")
    p.add_argument(f"--{prefix}residence-time", metavar="Q", help=f"{what} residence time 1/koff, e.g. '6 h'")


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _positive_float(text, option, minimum=0.0, strict=True):
    try:
        v = float(text)
    except (TypeError, ValueError):
        raise InputError(f"{option}: not a number: {text!r}") from None
    if not math.isfinite(v) or (v <= minimum if strict else v < minimum):
        raise InputError(f"{option}: must be {'greater than' if strict else 'at least'} {minimum:g}, got {text!r}")
    return v


def _emit(args, payload: dict, lines: list[str]) -> int:
    if args.json:
        payload = dict(payload, caution=CAUTION)
        print(json.dumps(payload, indent=2, allow_nan=False))
    else:
        for line in lines:
            print(line)
        print(CAUTION)
    return 0


# ----------------------------------------------------------------------------- apparent affinity
def _cmd_apparent(args) -> int:
    from ..services.simulation import assay_readout

    fmt_name = (args.format or "saturation").strip().lower()
    if fmt_name not in ("saturation", "competition", "competition-binding"):
        raise InputError(f"--format: unknown format {args.format!r}: use saturation or competition-binding")
    kd, kon, koff = _compound(args)
    t = _quantity(args, "incubation", "time")
    if t is None:
        raise InputError("--incubation is required, e.g. --incubation '1 h'")
    tol = _positive_float(args.tolerance, "--tolerance", 1.0)
    competition = fmt_name != "saturation"
    tracer_kw = {}
    tpre = _quantity(args, "preincubation", "time") if args.preincubation is not None else 0.0
    if competition:
        tkd, _tkon, tkoff = _compound(args, "tracer-")
        L = _quantity(args, "tracer_conc", "concentration")
        if L is None:
            raise InputError("competition format needs --tracer-conc, e.g. --tracer-conc '1 nM'")
        tracer_kw = dict(tracer_kd=tkd, tracer_koff=tkoff, tracer_conc=L)
    elif args.preincubation is not None:
        raise InputError("--preincubation applies to --format competition-binding only")
    fmt = "competition" if competition else "saturation"
    out = assay_readout(kd, koff, kon, t, fmt=fmt, preincubation=tpre, tolerance=tol, **tracer_kw)
    res, tmin, thumb, floor = out["apparent"], out["min_incubation"], out["rule_of_thumb"], out["floor"]
    apparent = float(res.apparent)
    fold = float(res.fold)
    payload = {
        "format": fmt,
        "kd_M": kd,
        "kon_per_M_per_s": kon,
        "koff_per_s": koff,
        "residence_time_s": 1.0 / koff,
        "incubation_s": t,
        "fold_shift": fold,
        "tolerance_fold": tol,
        "within_tolerance": bool(1.0 / tol <= fold <= tol),
        "min_incubation_s": _num(tmin),
        "rule_of_thumb_incubation_s": float(thumb),
        "assay_floor_M": float(floor),
    }
    if competition:
        payload.update(
            ic50_M=float(res.ic50),
            apparent_ki_M=apparent,
            tracer_kd_M=tracer_kw["tracer_kd"],
            tracer_residence_time_s=1.0 / tracer_kw["tracer_koff"],
            tracer_conc_M=tracer_kw["tracer_conc"],
            preincubation_s=tpre,
        )
    else:
        payload["apparent_kd_M"] = apparent
    what = "Ki" if competition else "KD"
    lines = [
        f"Compound: KD {fmt_conc(kd)}, residence time {fmt_time(1.0 / koff)} (kon {rate2(kon)}, koff {rate1(koff)})",
        f"Format: {fmt}"
        + (f", tracer KD {fmt_conc(tracer_kw['tracer_kd'])} at {fmt_conc(tracer_kw['tracer_conc'])}" if competition else "")
        + (f", pre-incubation {fmt_time(tpre)}" if competition and tpre > 0 else ""),
    ]
    if competition:
        lines.append(f"After {fmt_time(t)}: IC50 {fmt_conc(float(res.ic50))}, apparent Ki {fmt_conc(apparent)} (Cheng-Prusoff)")
    else:
        lines.append(f"After {fmt_time(t)}: apparent KD {fmt_conc(apparent)}")
    direction = "weaker" if fold > 1 else "more potent"
    verdict = "within" if payload["within_tolerance"] else "outside"
    lines.append(f"Fold shift vs true {what}: {fold:.3g} ({verdict} {tol:g}-fold; reads {direction})")
    lines.append(
        f"Minimum incubation for {tol:g}-fold: {fmt_time(payload['min_incubation_s'])}; "
        f"rule of thumb 2 x RT: {fmt_time(float(thumb))}"
    )
    near = apparent <= 2.0 * float(floor)
    payload["near_assay_floor"] = bool(near)
    lines.append(
        f"Assay floor at this incubation and kon: {fmt_conc(float(floor))}"
        + (" - the reading sits near the floor; the true affinity may be much tighter" if near else "")
    )
    return _emit(args, payload, lines)


# ----------------------------------------------------------------------------- engagement
def _cmd_engagement(args) -> int:
    from ..services.simulation import engagement_metrics

    kd, kon, koff = _compound(args)
    route = (args.route or "").strip().lower()
    if route not in ("oral", "iv"):
        raise InputError("--route must be oral or iv")
    cmax = _quantity(args, "free_cmax", "concentration")
    if cmax is None:
        raise InputError("--free-cmax is required (free concentration; for iv the concentration at t = 0)")
    hl = _quantity(args, "half_life", "time")
    if hl is None:
        raise InputError("--half-life is required, e.g. --half-life '2 h'")
    tmax = _quantity(args, "tmax", "time")
    if route == "oral" and tmax is None:
        raise InputError("--tmax is required for oral dosing, e.g. --tmax '1 h'")
    if route == "iv" and tmax is not None:
        raise InputError("--tmax applies to oral dosing only")
    try:
        thr = parse_quantity(args.threshold, "fraction").si
    except KrtError as exc:
        raise type(exc)(f"--threshold: {exc.one_line()}") from None
    if not 0 < thr < 1:
        raise InputError(f"--threshold must be an occupancy between 0 and 1 (exclusive), got {args.threshold!r}")
    tau = _quantity(args, "dosing_interval", "time")
    doses = args.doses
    if doses is None:
        doses = 1
    else:
        try:
            doses = int(doses)
        except ValueError:
            raise InputError(f"--doses: not a whole number: {args.doses!r}") from None
        if doses < 1 or doses > 200:
            raise InputError("--doses must be between 1 and 200")
    if doses > 1 and tau is None:
        raise InputError("--doses > 1 needs --dosing-interval")
    m = engagement_metrics(kon, koff, route, cmax, tmax, hl, thr, dosing_interval=tau, n_doses=doses)
    rec = m.to_records()[0]
    payload = {
        "onset_s": rec["onset_s"],
        "offset_s": rec["offset_s"],
        "duration_above_threshold_s": rec["duration_above_threshold_s"] if rec["onset_s"] is not None else 0.0,
        "peak_occupancy": rec["peak_occupancy"],
        "peak_time_s": rec["peak_time_s"],
        "trough_occupancy": rec["trough_occupancy"],
        "pd_half_life_s": rec["pd_half_life_s"],
        "terminal_pd_half_life_s": rec["terminal_half_life_s"],
        "rapid_equilibrium": {
            "onset_s": rec["rapid_onset_s"],
            "offset_s": rec["rapid_offset_s"],
            "peak_occupancy": rec["rapid_peak_occupancy"],
        },
        "inputs": {
            "kd_M": kd, "kon_per_M_per_s": kon, "koff_per_s": koff, "residence_time_s": 1.0 / koff,
            "route": route, "free_cmax_M": cmax, "tmax_s": tmax, "half_life_s": hl, "threshold": thr,
            "dosing_interval_s": tau, "doses": doses,
        },
    }
    ke = math.log(2) / hl
    lines = [
        f"Compound: KD {fmt_conc(kd)}, residence time {fmt_time(1.0 / koff)}; PK: {route}, free Cmax {fmt_conc(cmax)}"
        + (f", tmax {fmt_time(tmax)}" if tmax else "") + f", half-life {fmt_time(hl)}"
        + (f", every {fmt_time(tau)} x {doses}" if tau else ""),
        f"Threshold occupancy {thr:.0%}: onset {fmt_time(rec['onset_s'])}, offset {fmt_time(rec['offset_s'])}, "
        f"time above {fmt_time(payload['duration_above_threshold_s'])}",
        f"Peak occupancy {rec['peak_occupancy']:.1%} at {fmt_time(rec['peak_time_s'])}"
        + (f"; steady-state trough {rec['trough_occupancy']:.1%}" if rec["trough_occupancy"] is not None else ""),
        f"PD half-life after falling below threshold: {fmt_time(rec['pd_half_life_s'])} "
        f"(terminal {fmt_time(rec['terminal_half_life_s'])})",
        f"Rapid-equilibrium (PK only) onset {fmt_time(rec['rapid_onset_s'])}, offset {fmt_time(rec['rapid_offset_s'])}, "
        f"peak {rec['rapid_peak_occupancy']:.1%}",
        (
            "koff < ke: residence time outlasts exposure (prolonged engagement, delayed offset)"
            if koff < ke
            else "koff >= ke: engagement follows the PK profile"
        ),
    ]
    return _emit(args, payload, lines)


# ----------------------------------------------------------------------------- Ki shift -> RT
def _cmd_shift(args) -> int:
    from ..services.simulation import residence_time_bounds

    if args.ratio is None:
        raise InputError("--ratio is required: Ki at the short incubation / Ki at the long one")
    ratio = _positive_float(args.ratio, "--ratio")
    t_s = _quantity(args, "short_incubation", "time")
    t_l = _quantity(args, "long_incubation", "time")
    ki = _quantity(args, "ki", "concentration")
    for v, opt in ((t_s, "--short-incubation"), (t_l, "--long-incubation"), (ki, "--ki")):
        if v is None:
            raise InputError(f"{opt} is required")
    if t_l <= t_s:
        raise InputError("--long-incubation must be longer than --short-incubation")
    lo_text, hi_text = args.kon_range
    try:
        kon_lo = parse_quantity(lo_text, "rate2").si
        kon_hi = parse_quantity(hi_text, "rate2").si
    except KrtError as exc:
        raise type(exc)(f"--kon-range: {exc.one_line()}") from None
    if kon_lo > kon_hi:
        raise InputError("--kon-range: give the low value first")
    tol = _positive_float(args.ratio_tolerance, "--ratio-tolerance", 1.0, strict=False)
    b = residence_time_bounds(ratio, t_s, t_l, ki, kon_range=(kon_lo, kon_hi), ratio_tolerance=tol)
    low, high = float(b.rt_low), float(b.rt_high)
    consistent = bool(b.consistent)

    def rt(v):
        return None if (v is None or not math.isfinite(v)) else float(v)

    payload = {
        "ratio": ratio,
        "ratio_tolerance_fold": tol,
        "short_incubation_s": t_s,
        "long_incubation_s": t_l,
        "ki_long_M": ki,
        "kon_range_per_M_per_s": [kon_lo, kon_hi],
        "consistent": consistent,
        "verdict": str(b.verdict),
        "shift_detected": bool(b.shift_detected),
        "rt_low_s": rt(low),
        "rt_high_s": rt(high),
        "rt_high_unbounded": consistent and math.isinf(high),
        "rt_from_ratio_s": [rt(float(b.rt_from_ratio_low)), rt(float(b.rt_from_ratio_high))],
        "rt_from_kon_s": [rt(float(b.rt_from_kon_low)), rt(float(b.rt_from_kon_high))],
        "kd_estimate_M": ki,
        "kd_range_M": [rt(float(b.kd_at_rt_high)), rt(float(b.kd_at_rt_low))],
        "model": "fast-tracer competition (Cheng-Prusoff Ki equals the saturation apparent KD)",
        "notes": list(b.notes),
    }
    lines = [
        f"Ki shift {ratio:g}x between {fmt_time(t_s)} and {fmt_time(t_l)} (tolerance {tol:g}-fold), "
        f"Ki at {fmt_time(t_l)} {fmt_conc(ki)}, kon {rate2(kon_lo)} to {rate2(kon_hi)}",
    ]
    if consistent:
        hi_txt = "unbounded" if math.isinf(high) else fmt_time(high)
        kind = "shift detected" if b.shift_detected else "no shift detected (upper bound from the ratio)"
        lines.append(f"Residence time consistent with the evidence: {fmt_time(low)} to {hi_txt} ({kind})")
        lines.append(
            f"  from the shift alone: {fmt_time(rt(float(b.rt_from_ratio_low)) or 0.0)} to "
            f"{'unbounded' if math.isinf(float(b.rt_from_ratio_high)) else fmt_time(float(b.rt_from_ratio_high))}; "
            f"from the kon range: {fmt_time(float(b.rt_from_kon_low))} to "
            f"{'unbounded' if math.isinf(float(b.rt_from_kon_high)) else fmt_time(float(b.rt_from_kon_high))}"
        )
        kd_lo = payload["kd_range_M"][0]
        corrected = (
            f"{fmt_conc(kd_lo)} to {fmt_conc(ki)}" if kd_lo else f"anything below {fmt_conc(ki)} (may sit at the assay floor)"
        )
        lines.append(f"KD estimate: {fmt_conc(ki)} (Ki at {fmt_time(t_l)}); corrected for that incubation: {corrected}")
    elif payload["verdict"] == "kon-below-range":
        lines.append(
            f"Strongly slow binding: the shift alone implies residence time {fmt_time(float(b.rt_from_ratio_low))} to "
            f"{'unbounded' if math.isinf(float(b.rt_from_ratio_high)) else fmt_time(float(b.rt_from_ratio_high))}, and with "
            f"Ki {fmt_conc(ki)} at {fmt_time(t_l)} that needs a kon below {rate2(kon_lo)}, slower than the assumed range "
            "(widen --kon-range if such a kon is plausible, or measure the kinetics)"
        )
    elif payload["verdict"] == "kon-above-range":
        lines.append(f"The Ki at {fmt_time(t_l)} needs a kon above {rate2(kon_hi)} for any residence time the shift allows: "
                     "check the value and its units, or widen --kon-range")
    elif payload["verdict"] == "ratio-beyond-one-step":
        lines.append(f"The shift exceeds the {t_l / t_s:.3g}x a one-step binder can show between these incubations: "
                     "suspect two-step binding, compound loss or assay drift")
    else:
        lines.append("The short read is tighter than the long one beyond the tolerance: not slow binding in this model.")
    for note in b.notes:
        lines.append(f"Note: {note}")
    return _emit(args, payload, lines)


# ----------------------------------------------------------------------------- registration
def register(subparsers) -> None:
    sim = subparsers.add_parser("simulate", help="simulate apparent affinity, engagement under PK, RT bounds")
    sub = sim.add_subparsers(dest="simulate_command", metavar="SIMULATION")
    sim.set_defaults(func=lambda args: _missing(sim))

    a = sub.add_parser("apparent-affinity", help="apparent KD/Ki after a finite incubation")
    _add_compound_options(a)
    a.add_argument("--incubation", metavar="Q", help="incubation (read) time, e.g. '1 h'")
    a.add_argument("--format", default="saturation", help="saturation (default) or competition-binding")
    _add_compound_options(a, "tracer-", "tracer")
    a.add_argument("--tracer-conc", metavar="Q", help="tracer concentration (competition)")
    a.add_argument("--preincubation", metavar="Q", help="competitor pre-incubation before tracer addition (competition)")
    a.add_argument("--tolerance", default="1.25", help="fold within which a reading counts as correct (default 1.25)")
    a.add_argument("--json", action="store_true", help="print JSON")
    a.set_defaults(func=_cmd_apparent)

    e = sub.add_parser("engagement", help="target occupancy under a PK profile")
    _add_compound_options(e)
    e.add_argument("--route", metavar="ROUTE", help="oral or iv")
    e.add_argument("--free-cmax", metavar="Q", help="free Cmax of one dose (iv: concentration at t = 0)")
    e.add_argument("--tmax", metavar="Q", help="time of Cmax (oral)")
    e.add_argument("--half-life", metavar="Q", help="elimination half-life")
    e.add_argument("--threshold", default="0.3", help="occupancy threshold, 0-1 or %% (default 0.3)")
    e.add_argument("--dosing-interval", metavar="Q", help="repeat every Q (with --doses)")
    e.add_argument("--doses", metavar="N", help="number of doses (default 1)")
    e.add_argument("--json", action="store_true", help="print JSON")
    e.set_defaults(func=_cmd_engagement)

    k = sub.add_parser("ki-shift-bounds", help="residence-time interval from a Ki shift between two incubations")
    k.add_argument("--ratio", metavar="R", help="Ki(short incubation) / Ki(long incubation)")
    k.add_argument("--short-incubation", metavar="Q")
    k.add_argument("--long-incubation", metavar="Q")
    k.add_argument("--ki", metavar="Q", help="Ki measured at the long incubation (the KD estimate)")
    k.add_argument("--kon-range", nargs=2, metavar=("LOW", "HIGH"), default=["1e5 /M/s", "1e8 /M/s"],
                   help="plausible kon range (default 1e5 1e8 /M/s, typical small molecules)")
    k.add_argument("--ratio-tolerance", default="1.5", help="fold uncertainty of the measured ratio (default 1.5)")
    k.add_argument("--json", action="store_true", help="print JSON")
    k.set_defaults(func=_cmd_shift)


def _missing(parser) -> int:
    raise InputError("choose a simulation: apparent-affinity, engagement or ki-shift-bounds (krt simulate -h)")
