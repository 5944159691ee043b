"""One small pure ``check_*`` function per rule, vectorised over whole portfolios.

Each check takes a :class:`pandas.DataFrame` (one row per potency value, per
evidence item or per compound; the columns are listed in its docstring), takes
its thresholds as keyword arguments (a scalar, or an array with one value per
row when programs override the defaults), calls the vectorised simulation of
:mod:`tracker.kinetics` once per assay-format group, and returns a findings
frame with the columns of :data:`FINDING_COLUMNS`:

``compound_id``, ``rule``, ``severity`` (high|moderate|low), ``message``,
``prompt``, ``caution`` (None where patients are not concerned) and ``data``
(a dict of the numbers behind the finding, SI units in the key names).

Severity (design choice, stated once here):
``score = evidence level + stage level``, where the evidence level is 0 (weak:
a shift just beyond tolerance, a potency at the assay floor), 1 (a shift of
``fold_moderate``-fold or more, a Ki shift above the threshold, an
insurmountable curve) or 2 (a shift of ``fold_high``-fold or more, a Ki shift
that large, an Emax below ``insurmountable_strong_fraction``), and the stage
level is 0 for hit and hit-to-lead, 1 for lead-optimization and advanced-lead,
2 for candidate and clinical.  Score <= 1 is ``low``, 2 ``moderate``, >= 3
``high``.  Inferred ("likely") findings are capped at ``moderate`` before
``candidate``.

The checks are decision support for reading potency data; they are not dosing
advice.  Findings that could touch patients carry a caution saying so.
"""

from __future__ import annotations

import math
from collections import namedtuple
from typing import Any

import numpy as np
import pandas as pd

from ..domain import STAGES
from ..kinetics.assay import apparent_affinity, assay_floor, min_incubation, residence_time_bounds, saturation_fold
from .. import fmt as _fmt
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..kinetics.pk import MAX_TMAX_KE
from .engagement import ONSET_DOSES, REGIMEN_METRICS, duration_set_by, regimen_engagement

__all__ = [
    "FINDING_COLUMNS",
    "STAGE_LEVEL",
    "CAUTION_AFFINITY",
    "CAUTION_NOT_DOSING_ADVICE",
    "CAUTION_OFFSET",
    "severity_from",
    "next_stage",
    "suggest_assay",
    "assay_suggestions",
    "predict_apparent",
    "ki_shift_outcome",
    "check_affinity_underestimate",
    "check_ki_shift",
    "check_insurmountability",
    "check_assay_floor",
    "check_tight_binding",
    "check_conflicting_kinetics",
    "CAUTION_OVERESTIMATE",
    "check_residence_time_unmeasured",
    "check_duration_mismatch",
    "fmt_fold",
]

FINDING_COLUMNS = ["compound_id", "rule", "severity", "message", "prompt", "caution", "data"]

#: How far a stage is from patients (design choice, see the module docstring).
STAGE_LEVEL: dict[str, int] = {
    "hit": 0,
    "hit-to-lead": 0,
    "lead-optimization": 1,
    "advanced-lead": 1,
    "candidate": 2,
    "clinical": 2,
}
_LEAD_OPT = STAGES.index("lead-optimization")
_ADVANCED = STAGES.index("advanced-lead")
_CANDIDATE = STAGES.index("candidate")

CAUTION_NOT_DOSING_ADVICE = (
    "Simulations are not dosing advice; defer to qualified pharmacology and safety review and to regulatory "
    "guidance on first-in-human dose selection."
)
CAUTION_AFFINITY = (
    "An underestimated affinity means higher target coverage than assumed at a given exposure, with a risk of "
    "mechanism-based toxicity. " + CAUTION_NOT_DOSING_ADVICE
)
CAUTION_OFFSET = (
    "A long offset for a short-acting drug can mean next-day impairment (e.g. residual sedation or effects on "
    "driving). " + CAUTION_NOT_DOSING_ADVICE
)


# ----------------------------------------------------------------------------- helpers
def _col(x, n: int, dtype=float) -> np.ndarray:
    """A threshold (scalar or one per row) as an array of length ``n``."""
    a = np.asarray(x, dtype=dtype)
    return np.broadcast_to(a, (n,)).copy() if a.ndim == 0 else a.reshape(n)


def _num(df: pd.DataFrame, name: str) -> np.ndarray:
    if name not in df.columns:
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[name], errors="coerce").to_numpy(dtype=float)


def _lookup(values, mapping: dict, default) -> np.ndarray:
    """``mapping[v]`` for every value (vectorised through pandas), ``default`` for unknown values."""
    return pd.Series(np.asarray(values, dtype=object)).map(mapping).fillna(default).to_numpy()


def _stage_index(stages) -> np.ndarray:
    return _lookup(stages, {s: i for i, s in enumerate(STAGES)}, -1).astype(int)


def _stage_level(stages) -> np.ndarray:
    return _lookup(stages, STAGE_LEVEL, 0).astype(int)


def _rows(df: pd.DataFrame, names: list[str]) -> list:
    """Rows as named tuples of plain objects (fast to iterate; a missing column gives None)."""
    n = len(df)
    arrays = [df[c].to_numpy(dtype=object) if c in df.columns else np.full(n, None, dtype=object) for c in names]
    row = namedtuple("Row", names)
    return [row(*vals) for vals in zip(*arrays)]


def severity_from(level, stages, *, likely=False) -> np.ndarray:
    """Severity from evidence level (0-2) and stage; ``likely`` caps at moderate before candidate."""
    level = np.asarray(level, dtype=int)
    stage_lv = _stage_level(stages)
    score = level + stage_lv
    if likely:
        capped = (stage_lv < 2) & (score > 2)
        score = np.where(capped, 2, score)
    return np.where(score >= 3, "high", np.where(score == 2, "moderate", "low")).astype(object)


def next_stage(stage: str) -> str:
    """The stage after ``stage``; ``"next"`` after the last stage or for an unknown one."""
    i = STAGES.index(stage) if stage in STAGES else -1
    return STAGES[i + 1] if 0 <= i < len(STAGES) - 1 else "next"


def fmt_fold(x: float | None) -> str:
    """``43×``, ``4.63×`` (:func:`tracker.fmt.fold`)."""
    return _fmt.fold(x)


def _fmt_ci(lo, hi, fn) -> str:
    return _fmt.interval(lo, hi, fn)


def _plain(v: Any) -> Any:
    if isinstance(v, float):  # numpy float64 included
        return float(v) if math.isfinite(v) else None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (np.integer, np.floating)):
        return _plain(v.item())
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    return v


_FLOATS = (float, np.float64)
_PLAIN = (str, bool, int)


def _data(**kw) -> dict[str, Any]:
    """Numbers of a finding: numpy scalars unwrapped, NaN and None dropped, ids as int."""
    out = {}
    for k, v in kw.items():
        t = type(v)
        if t in _FLOATS:
            if math.isfinite(v):
                out[k] = int(v) if k.endswith("_id") else float(v)
        elif t in _PLAIN:
            out[k] = v
        elif v is not None:
            v = _plain(v)
            if v is None or (isinstance(v, list) and all(x is None for x in v)):
                continue
            out[k] = int(v) if k.endswith("_id") and isinstance(v, float) else v
    return out


def _ids(v) -> list[int] | None:
    """A list of ids from a list cell (NaN or empty -> None)."""
    if isinstance(v, (list, tuple, np.ndarray)) and len(v):
        return [int(i) for i in v]
    return None


def _empty() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in FINDING_COLUMNS})


def _frame(records: list[dict]) -> pd.DataFrame:
    """Findings as a frame; the text columns stay Python objects (pandas would convert them to Arrow
    strings, which every later row-wise read, e.g. the JSON output, pays for again)."""
    if not records:
        return _empty()
    cols = {c: [r.get(c, np.nan) for r in records] for c in FINDING_COLUMNS}
    return pd.DataFrame({c: (pd.Series(v) if c == "compound_id" else pd.Series(v, dtype=object)) for c, v in cols.items()})


def suggest_assay(formats, has_tracer: bool = False) -> str:
    """The kinetic assay to suggest for a compound measured in ``formats`` (common practice).

    Receptors with a labelled tracer: competition kinetics (Motulsky & Mahan
    1984); enzymes: jump dilution (Copeland); direct binding formats:
    association-dissociation or SPR; functional only: washout recovery.
    """
    formats = set(f for f in formats if isinstance(f, str))
    if "competition-binding" in formats and has_tracer:
        return "competition kinetics (Motulsky–Mahan) with the existing tracer"
    if "enzyme" in formats:
        return "jump dilution"
    if "binding" in formats or "competition-binding" in formats:
        return "association–dissociation binding or SPR"
    if "functional" in formats:
        return "functional washout recovery (or binding kinetics if a tracer exists)"
    return "SPR or association–dissociation binding"


def assay_suggestions(potency: pd.DataFrame, compound_ids) -> dict:
    """compound_id -> :func:`suggest_assay` from the formats of its potency rows (one pass over the rows)."""
    ids = list(compound_ids)
    if potency is None or potency.empty:
        return {c: suggest_assay(set()) for c in ids}
    cid = potency["compound_id"].to_numpy()
    fmt = potency["format"].to_numpy(dtype=object)
    tracer = (potency["tracer_conc_M"].notna() & potency["tracer_kd_M"].notna()).to_numpy() if "tracer_kd_M" in potency.columns else np.zeros(cid.size, bool)
    by_format = {f: set(cid[fmt == f].tolist()) for f in pd.unique(fmt)}
    with_tracer = set(cid[(fmt == "competition-binding") & tracer].tolist())
    return {c: suggest_assay({f for f, members in by_format.items() if c in members}, c in with_tracer) for c in ids}


# ----------------------------------------------------------------------------- prediction
def predict_apparent(rows: pd.DataFrame, *, tolerance=1.25) -> pd.DataFrame:
    """The evidence model's prediction per potency reading (:func:`tracker.rules.evidence.predict_readings`)."""
    from .evidence import predict_readings

    return predict_readings(rows, tolerance=tolerance)


CAUTION_OVERESTIMATE = (
    "An overestimated affinity means lower target coverage than assumed at a given exposure: doses projected from it "
    "can under-engage the target. " + CAUTION_NOT_DOSING_ADVICE
)


def _group_keys(rows: pd.DataFrame) -> np.ndarray:
    key = rows["reading_group"] if "reading_group" in rows.columns else rows["assay"]
    parts = [rows["compound_id"].astype(str), key.astype(str), rows["readout"].astype(str), rows["format"].astype(str)]
    return (parts[0] + "\x1f" + parts[1] + "\x1f" + parts[2] + "\x1f" + parts[3]).to_numpy(dtype=object)


# ----------------------------------------------------------------------------- affinity-underestimate / -overestimate (RT known)
def check_affinity_underestimate(
    rows: pd.DataFrame,
    *,
    incubation_multiple=2.0,
    fold_tolerance=1.25,
    fold_moderate=3.0,
    fold_high=10.0,
    max_incubation_s=86400.0,
) -> pd.DataFrame:
    """``affinity-underestimate`` and ``affinity-overestimate`` for readings of compounds with measured kinetics.

    ``rows``: one row per potency reading with ``compound_id``, ``stage``,
    ``potency_id``, ``assay``, ``readout``, ``value_M``, ``incubation_s``,
    ``format``, the tracer columns, optional ``preincubation_s``,
    ``max_incubation_s`` and ``reading_group`` (readings of one assay at
    several times share it), and the compound's kinetics ``koff_per_s``,
    ``kon_per_M_s``, ``kd_M``, ``koff_low_per_s``, ``koff_high_per_s``,
    ``kinetic_measurement_id`` (optional ``rt_lower_bound``).  The
    predictions of :func:`tracker.rules.evidence.predict_readings` are used
    when present, else computed.

    Fires where the format-aware predicted fold lies outside
    [1/``fold_tolerance``, ``fold_tolerance``] (common practice: 1.25-fold),
    whatever the incubation is relative to RT: too weak is
    ``affinity-underestimate``, too potent (a slow tracer at high
    concentration, read early) is ``affinity-overestimate``.  One finding per
    reading group and direction, about its worst reading; the recommended
    incubation is the format-aware minimum of the group's readings; where it
    exceeds the assay's practical maximum (``max_incubation_s`` per row, else
    the keyword) a kinetic method is recommended instead.  Severity from the
    fold away from 1 (``fold_moderate``, ``fold_high``) and the stage.

    Examples
    --------
    >>> rows = pd.DataFrame({"compound_id": [1], "stage": ["candidate"], "potency_id": [7], "assay": ["bind"],
    ...     "readout": ["KD"], "value_M": [4.6e-9], "incubation_s": [3600.0], "format": ["binding"],
    ...     "koff_per_s": [1 / 21600], "kon_per_M_s": [1 / 21600 / 1e-9]})
    >>> f = check_affinity_underestimate(rows)
    >>> f.loc[0, "severity"], round(f.loc[0, "data"]["fold_shift"], 2)
    ('high', 4.62)
    """
    n = len(rows)
    if n == 0:
        return _empty()
    tol_all = _col(fold_tolerance, n)
    pred = rows if "min_incubation_s" in rows.columns else pd.concat([rows, predict_apparent(rows, tolerance=tol_all)], axis=1)
    pred = pred.reset_index(drop=True)
    koff = _num(pred, "koff_per_s")
    t = _num(pred, "incubation_s")
    fold = _num(pred, "fold_shift")
    mult = _col(incubation_multiple, n)
    f_mod = _col(fold_moderate, n)
    f_high = _col(fold_high, n)
    max_row = _num(pred, "max_incubation_s")
    max_inc = np.where(np.isfinite(max_row) & (max_row > 0), max_row, _col(max_incubation_s, n))
    weak = np.isfinite(fold) & (fold > tol_all)
    potent = np.isfinite(fold) & (fold < 1.0 / tol_all)
    fires = weak | potent
    if not fires.any():
        return _empty()
    dev = np.where(fold > 0, np.abs(np.log(np.where(fold > 0, fold, 1.0))), 0.0)
    keys = _group_keys(pred) + np.where(weak, "\x1fweak", "\x1fpotent").astype(object)
    idx = np.nonzero(fires)[0]
    frame = pd.DataFrame({"_k": keys[idx], "_i": idx, "_dev": dev[idx], "_tmin": _num(pred, "min_incubation_s")[idx]})
    worst = frame.sort_values(["_k", "_dev", "_i"], ascending=[True, False, True], kind="mergesort").drop_duplicates("_k")
    grp = frame.groupby("_k")
    members = grp["_i"].agg(list)
    tmin_group = grp["_tmin"].max()
    worst = worst.sort_values("_i", kind="mergesort")
    pick = worst["_i"].to_numpy()
    sel = pred.iloc[pick]
    fx = fold[pick]
    level = np.where(np.maximum(fx, 1 / fx) >= f_high[pick], 2, np.where(np.maximum(fx, 1 / fx) >= f_mod[pick], 1, 0))
    severity = severity_from(level, sel["stage"].to_numpy())
    rt = 1.0 / koff
    lower_bound = sel["rt_lower_bound"].fillna(False).astype(bool).to_numpy() if "rt_lower_bound" in sel.columns else np.zeros(pick.size, bool)
    pre = _num(sel, "preincubation_s")
    suggestions = assay_suggestions(pred, set(pred["compound_id"].tolist()))
    records = []
    names = ["compound_id", "stage", "assay", "readout", "value_M", "fold_shift_low", "fold_shift_high", "note", "corrected_affinity_M",
             "potency_id", "kinetic_measurement_id", "simulated_as", "tracer_conc_M", "tracer_kd_M", "tracer_residence_time_s"]
    all_ids = _num(pred, "potency_id")
    for k, r in enumerate(_rows(sel, names)):
        i = pick[k]
        key = worst["_k"].iloc[k]
        group = members[key]
        f, lo, hi = fold[i], r.fold_shift_low, r.fold_shift_high
        tol = tol_all[i]
        min_inc = float(tmin_group[key])
        thumb = mult[i] * rt[i]
        beyond = np.isfinite(min_inc) and min_inc > max_inc[i]
        rt_text = ("≥ " if lower_bound[k] else "") + fmt_time(rt[i])
        note = f"; {r.note}" if r.note else ""
        pre_text = f" (after {fmt_time(pre[k])} pre-incubation)" if np.isfinite(pre[k]) and pre[k] > 0 else ""
        others = ""
        if len(group) > 1:
            times = sorted({float(t[j]) for j in group if j != i})
            others = f"; {len(group) - 1} more reading(s) of this assay ({', '.join(fmt_time(x) for x in times)}) also fall outside {tol:g}-fold"
        ids = sorted(int(all_ids[j]) for j in group if np.isfinite(all_ids[j]))
        if weak[i]:
            rule, caution = "affinity-underestimate", CAUTION_AFFINITY
            msg = (
                f"{r.assay} {r.readout} {fmt_conc(r.value_M)} after {fmt_time(t[i])}{pre_text} is predicted to read "
                f"{'at least ' if lower_bound[k] else ''}{fmt_fold(f)} too weak{_fmt_ci(lo, hi, fmt_fold)} for residence time {rt_text} "
                f"(incubation {fmt_fold(t[i] / rt[i])} RT); equilibrium {r.readout} ≈ {fmt_conc(r.corrected_affinity_M)}; "
                f"reads within {tol:g}-fold only after {fmt_time(min_inc)}{others}{note}"
            )
        else:
            rule, caution = "affinity-overestimate", CAUTION_OVERESTIMATE
            tracer = ""
            if r.simulated_as == "competition":
                L, kd_t, rt_t = float(r.tracer_conc_M), float(r.tracer_kd_M), float(r.tracer_residence_time_s)
                tracer = (f": the tracer (RT {fmt_time(rt_t)}, {fmt_conc(L)} = {fmt_fold(L / kd_t)} its KD) has not equilibrated when read, "
                          "so the compound looks tighter than it is")
            msg = (
                f"{r.assay} {r.readout} {fmt_conc(r.value_M)} after {fmt_time(t[i])}{pre_text} is predicted to read "
                f"{fmt_fold(1 / f)} too potent{_fmt_ci(1 / hi if hi == hi else hi, 1 / lo if lo == lo else lo, fmt_fold)}{tracer}; "
                f"equilibrium {r.readout} ≈ {fmt_conc(r.corrected_affinity_M)} (residence time {rt_text}); reads within {tol:g}-fold "
                f"only after {fmt_time(min_inc)}{others}{note}"
            )
        if beyond:
            method = suggestions.get(r.compound_id) or suggest_assay(set())
            prompt = (
                f"{r.assay} would need ≥ {fmt_time(min_inc)} to read within {tol:g}-fold, beyond its practical maximum of "
                f"{fmt_time(max_inc[i])}: rank on a kinetic method ({method}) or on the corrected {fmt_conc(r.corrected_affinity_M)} "
                f"before the {next_stage(r.stage)} decision"
            )
        else:
            prompt = (
                f"Re-run {r.assay} with ≥ {fmt_time(min_inc)} incubation (or rank on the corrected "
                f"{fmt_conc(r.corrected_affinity_M)}) before the {next_stage(r.stage)} decision"
            )
        records.append({
            "compound_id": r.compound_id, "rule": rule, "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": caution,
            "data": _data(
                likely=False, evidence="residence-time", potency_id=r.potency_id,
                kinetic_measurement_id=r.kinetic_measurement_id, assay=r.assay, readout=r.readout,
                value_M=r.value_M, incubation_s=t[i], preincubation_s=pre[k], residence_time_s=rt[i],
                residence_time_is_lower_bound=bool(lower_bound[k]),
                fold_shift=f, fold_shift_ci95=[lo, hi] if math.isfinite(lo) or math.isfinite(hi) else None,
                corrected_affinity_M=r.corrected_affinity_M, min_incubation_s=min_inc,
                rule_of_thumb_incubation_s=thumb, recommended_incubation_s=None if beyond else min_inc,
                max_incubation_s=max_inc[i], kinetic_method_recommended=bool(beyond),
                potency_ids=ids, n_readings=len(group), direction="too-weak" if weak[i] else "too-potent",
                simulated_as=r.simulated_as, approximation=r.note or None,
            ),
        })
    return _frame(records)


# ----------------------------------------------------------------------------- affinity-underestimate (likely)
def ki_shift_outcome(ratio, *, ki_shift_threshold=6.0, no_shift_ratio=1.5, short_incubation=None, long_incubation=None) -> np.ndarray:
    """``'shift'``, ``'no-shift'`` or ``'inconclusive'`` for Ki-shift ratios.

    A one-step binder read in the linear regime shifts by at most
    t_long/t_short, so the outcome is judged against that pair: ``'shift'``
    when the ratio is beyond replicate scatter (> ``no_shift_ratio``) or above
    ``ki_shift_threshold``; ``'no-shift'`` only when the ratio is below
    ``no_shift_ratio`` AND the pair could have shown a shift (t_long/t_short
    above ``no_shift_ratio`` squared, so that a slow binder's shift would
    clear the scatter band); everything else ``'inconclusive'``.  Without the
    incubation times the pair is assumed able to show a shift.
    """
    r = np.asarray(ratio, dtype=float)
    thr = np.asarray(ki_shift_threshold, dtype=float)
    none = np.asarray(no_shift_ratio, dtype=float)
    if short_incubation is None or long_incubation is None:
        allowed = np.full(r.shape, np.inf)
    else:
        allowed = np.asarray(long_incubation, dtype=float) / np.asarray(short_incubation, dtype=float)
        allowed = np.where(np.isfinite(allowed), allowed, np.inf)
    can_show = allowed > none ** 2
    return np.where((r > thr) | (r > none), "shift", np.where((r < none) & can_show, "no-shift", "inconclusive")).astype(object)


def check_ki_shift(
    pairs: pd.DataFrame,
    *,
    ki_shift_threshold=6.0,
    no_shift_ratio=1.5,
    fold_moderate=3.0,
    fold_high=10.0,
    kon_low=1e5,
    kon_high=1e8,
) -> pd.DataFrame:
    """``affinity-underestimate`` ("likely") from a Ki shift between two incubation times.

    ``pairs``: one row per comparison, ``compound_id``, ``stage``, ``assay``,
    ``ratio`` (potency short / potency long), optional ``ratio_low``/``ratio_high``
    (95% interval of a fitted ratio), ``incubation_short_s``,
    ``incubation_long_s``, ``value_long_M`` (the long-incubation potency, for
    the residence-time bounds), ``source`` (``potency`` or ``fit``) and the ids
    ``potency_ids`` / ``time_course_id`` / ``kinetic_measurement_id``.

    A one-step binder read in the linear regime shifts by at most
    t_long/t_short (30 min vs 3 h: 6x; 1 h vs 4 h: 4x; 15 min vs 1 h: 4x), so
    a fixed threshold would be blind for such pairs.  The shift is judged
    against the pair instead: it fires when the ratio exceeds replicate
    scatter (``no_shift_ratio``, common practice ~1.5-fold) or
    ``ki_shift_threshold``.  The message states the residence-time interval
    the shift implies (:func:`~tracker.kinetics.assay.residence_time_bounds`,
    alone and with kon in ``[kon_low, kon_high]``), and says when the data
    imply a kon outside that range rather than calling them inconsistent.
    Evidence level: 2 when the ratio reaches ``fold_high`` or the scatter
    band reaches the pair's maximum (the long read may itself be far from
    equilibrium), 1 from ``fold_moderate`` or ``ki_shift_threshold``, else 0;
    capped at moderate before candidate.
    """
    n = len(pairs)
    if n == 0:
        return _empty()
    ratio = _num(pairs, "ratio")
    thr = _col(ki_shift_threshold, n)
    none = _col(no_shift_ratio, n)
    t_s_all = _num(pairs, "incubation_short_s")
    t_l_all = _num(pairs, "incubation_long_s")
    outcome = ki_shift_outcome(ratio, ki_shift_threshold=thr, no_shift_ratio=none, short_incubation=t_s_all, long_incubation=t_l_all)
    fires = np.isfinite(ratio) & (outcome == "shift")
    if not fires.any():
        return _empty()
    idx = np.nonzero(fires)[0]
    sel = pairs.iloc[idx]
    rx = ratio[idx]
    t_s = t_s_all[idx]
    t_l = t_l_all[idx]
    allowed = np.where(np.isfinite(t_l / t_s), t_l / t_s, np.inf)
    tol_r = none[idx]
    at_max = rx * tol_r >= allowed
    level = np.where((rx >= _col(fold_high, n)[idx]) | at_max, 2,
                     np.where((rx >= _col(fold_moderate, n)[idx]) | (rx >= thr[idx]), 1, 0))
    severity = severity_from(level, sel["stage"].to_numpy(), likely=True)
    v_l = _num(sel, "value_long_M")
    k_lo, k_hi = _col(kon_low, n)[idx], _col(kon_high, n)[idx]
    rt_lo = np.full(idx.size, np.nan)
    rt_hi = np.full(idx.size, np.nan)
    r_lo_rt = np.full(idx.size, np.nan)
    r_hi_rt = np.full(idx.size, np.nan)
    verdict = np.full(idx.size, "", dtype=object)
    ok = np.isfinite(t_s) & np.isfinite(t_l) & (t_l > t_s) & (t_s > 0) & np.isfinite(v_l) & (v_l > 0)
    for lo_k, hi_k, tr in set(zip(k_lo[ok], k_hi[ok], tol_r[ok])):  # one vectorised call per kon range and tolerance
        m = ok & (k_lo == lo_k) & (k_hi == hi_k) & (tol_r == tr)
        b = residence_time_bounds(rx[m], t_s[m], t_l[m], v_l[m], kon_range=(lo_k, hi_k), ratio_tolerance=float(tr))
        rt_lo[m], rt_hi[m] = b.rt_low, b.rt_high
        r_lo_rt[m], r_hi_rt[m] = b.rt_from_ratio_low, b.rt_from_ratio_high
        verdict[m] = np.asarray(b.verdict, dtype=object)
    r_lo = _num(sel, "ratio_low")
    r_hi = _num(sel, "ratio_high")
    records = []
    names = ["compound_id", "stage", "assay", "source", "potency_ids", "time_course_id", "kinetic_measurement_id"]
    span = lambda a, b: (f"{fmt_time(a)} to {fmt_time(b)}" if np.isfinite(b) else f"≥ {fmt_time(a)}")  # noqa: E731
    for k, r in enumerate(_rows(sel, names)):
        when = ""
        if np.isfinite(t_s[k]) and np.isfinite(t_l[k]):
            when = f" after {fmt_time(t_s[k])} than after {fmt_time(t_l[k])}"
        pair = (f", {'at' if at_max[k] else 'against'} the {fmt_fold(allowed[k])} a one-step binder can show between these incubations"
                if np.isfinite(allowed[k]) else "")
        rt_text = ""
        kon_range = f"kon {_fmt.sig(k_lo[k])}–{_fmt.rate2(k_hi[k])}"
        if verdict[k] == "consistent":
            rt_text = f"; the evidence implies residence time {span(rt_lo[k], rt_hi[k])} ({kon_range})"
        elif verdict[k] == "kon-below-range":
            rt_text = (f"; the shift alone implies residence time {span(r_lo_rt[k], r_hi_rt[k])}, which with this potency needs a kon "
                       f"below {_fmt.rate2(k_lo[k])} (slower association than the assumed {kon_range}): strongly slow binding")
        elif verdict[k] == "kon-above-range":
            rt_text = (f"; the shift alone implies residence time {span(r_lo_rt[k], r_hi_rt[k])}, which with this potency needs a kon "
                       f"above {_fmt.rate2(k_hi[k])}: check the long-incubation value and its units")
        elif verdict[k] == "ratio-beyond-one-step":
            rt_text = (f"; the shift is larger than a one-step binder can show between these times (at most {fmt_fold(allowed[k])}): "
                       "suspect a two-step (induced-fit) binder, compound loss or assay drift")
        elif np.isfinite(r_lo_rt[k]):
            rt_text = f"; the shift alone implies residence time {span(r_lo_rt[k], r_hi_rt[k])}"
        eq = f"; rank on the {fmt_time(t_l[k])} value ({fmt_conc(v_l[k])}) or tighter" if np.isfinite(v_l[k]) and np.isfinite(t_l[k]) else ""
        msg = (
            f"likely underestimated: {r.assay} reads {fmt_fold(rx[k])} weaker{when}"
            f"{_fmt_ci(r_lo[k], r_hi[k], fmt_fold)}{pair}, beyond the {tol_r[k]:g}-fold replicate scatter: slow binding; "
            f"residence time not measured{rt_text}{eq}"
        )
        prompt = f"Measure residence time before the {next_stage(r.stage)} decision; until then do not rank on short-incubation potency"
        records.append({
            "compound_id": r.compound_id, "rule": "affinity-underestimate", "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": CAUTION_AFFINITY,
            "data": _data(
                likely=True, evidence="ki-shift", source=r.source or "potency", assay=r.assay,
                ki_shift_ratio=rx[k], ki_shift_ratio_ci95=[r_lo[k], r_hi[k]] if np.isfinite(r_lo[k]) else None,
                ki_shift_threshold=thr[idx][k], max_shift_for_pair=allowed[k] if np.isfinite(allowed[k]) else None,
                incubation_short_s=t_s[k], incubation_long_s=t_l[k], value_long_M=v_l[k],
                residence_time_low_s=rt_lo[k] if np.isfinite(rt_lo[k]) else r_lo_rt[k],
                residence_time_high_s=(rt_hi[k] if np.isfinite(rt_lo[k]) else r_hi_rt[k]) if np.isfinite(rt_hi[k] if np.isfinite(rt_lo[k]) else r_hi_rt[k]) else None,
                rt_bounds_verdict=verdict[k] or None,
                potency_ids=_ids(r.potency_ids), time_course_id=r.time_course_id, kinetic_measurement_id=r.kinetic_measurement_id,
            ),
        })
    return _frame(records)


def check_insurmountability(
    rows: pd.DataFrame,
    *,
    insurmountable_fraction=0.8,
    insurmountable_strong_fraction=0.5,
) -> pd.DataFrame:
    """``affinity-underestimate`` ("likely") from an insurmountable functional curve.

    ``rows``: ``compound_id``, ``stage``, ``assay``, ``max_response_fraction``
    (agonist maximum with antagonist / control), optional
    ``max_response_fraction_low``/``_high`` (95% interval of a fit), ``source``
    and ids ``potency_id`` / ``time_course_id`` / ``kinetic_measurement_id``.

    Fires when the fraction is below ``insurmountable_fraction`` (0.8, see
    :mod:`tracker.rules.config`).  Level 2 below
    ``insurmountable_strong_fraction``, else 1; capped at moderate before
    candidate.  Evidence of slow dissociation, not proof (receptor reserve can
    hide it; allosteric modulators also depress Emax: Kenakin, Jenkinson &
    Watson 2006, from memory).
    """
    n = len(rows)
    if n == 0:
        return _empty()
    frac = _num(rows, "max_response_fraction")
    thr = _col(insurmountable_fraction, n)
    strong = _col(insurmountable_strong_fraction, n)
    fires = np.isfinite(frac) & (frac < thr)
    if not fires.any():
        return _empty()
    idx = np.nonzero(fires)[0]
    sel = rows.iloc[idx]
    level = np.where(frac[idx] < strong[idx], 2, 1)
    severity = severity_from(level, sel["stage"].to_numpy(), likely=True)
    lo = _num(sel, "max_response_fraction_low")
    hi = _num(sel, "max_response_fraction_high")
    pct = _fmt.pct
    records = []
    names = ["compound_id", "stage", "assay", "source", "potency_id", "time_course_id", "kinetic_measurement_id"]
    for k, r in enumerate(_rows(sel, names)):
        f = frac[idx][k]
        msg = (
            f"likely underestimated: {r.assay} is insurmountable, the agonist maximum falls to {pct(f)} of control"
            f"{_fmt_ci(lo[k], hi[k], pct)} (threshold {pct(thr[idx][k])}), the signature of slow antagonist dissociation "
            "(hemi-equilibrium); residence time not measured. Receptor reserve can hide it and allosteric modulators can "
            "also depress the maximum, so this is evidence, not proof"
        )
        prompt = f"Measure residence time (functional washout or binding kinetics) before the {next_stage(r.stage)} decision"
        records.append({
            "compound_id": r.compound_id, "rule": "affinity-underestimate", "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": CAUTION_AFFINITY,
            "data": _data(
                likely=True, evidence="insurmountable", source=r.source or "potency", assay=r.assay,
                max_response_fraction=f, max_response_fraction_ci95=[lo[k], hi[k]] if np.isfinite(lo[k]) else None,
                insurmountable_fraction=thr[idx][k], potency_id=r.potency_id,
                time_course_id=r.time_course_id, kinetic_measurement_id=r.kinetic_measurement_id,
            ),
        })
    return _frame(records)


def _floors(rows: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(floor per row, competition mask): the tightest value each reading can report for its kon."""
    n = len(rows)
    value = _num(rows, "value_M")
    t = _num(rows, "incubation_s")
    pre = np.nan_to_num(_num(rows, "preincubation_s"), nan=0.0)
    pre = np.where(pre > 0, pre, 0.0)
    kon = _num(rows, "kon_per_M_s")
    L = _num(rows, "tracer_conc_M")
    kd_t = _num(rows, "tracer_kd_M")
    rt_t = _num(rows, "tracer_residence_time_s")
    fmt = rows["format"].astype(object).to_numpy()
    readout = rows["readout"].astype(object).to_numpy()
    ok = np.isfinite(value) & (value > 0) & np.isfinite(t) & (t > 0) & np.isfinite(kon) & (kon > 0)
    tracer_ok = np.isfinite(L) & (L > 0) & np.isfinite(kd_t) & (kd_t > 0) & np.isfinite(rt_t) & (rt_t > 0)
    comp = ok & (fmt == "competition-binding") & tracer_ok
    sat = ok & ~comp
    floor = np.full(n, np.nan)
    if sat.any():
        floor[sat] = assay_floor(kon[sat], t[sat] + pre[sat])
    if comp.any():
        floor[comp] = assay_floor(kon[comp], t[comp], format="competition", tracer_kd=kd_t[comp],
                                  tracer_koff=1.0 / rt_t[comp], tracer_conc=L[comp], preincubation=pre[comp])
        ic = comp & (readout == "IC50")
        floor[ic] = floor[ic] * (1.0 + L[ic] / kd_t[ic])
    return floor, comp


def check_assay_floor(rows: pd.DataFrame, *, floor_factor=2.0, below_floor_factor=3.0) -> pd.DataFrame:
    """Readings at (``affinity-underestimate``, "likely") or far below (``potency-below-floor``) the assay floor.

    ``rows``: one row per potency value with ``compound_id``, ``stage``,
    ``potency_id``, ``assay``, ``readout``, ``value_M``, ``incubation_s``,
    ``format``, tracer columns, optional ``preincubation_s``,
    ``kon_per_M_s`` (the series' median measured kon, else the assumed one)
    and ``kon_source`` (text).

    The floor is the tightest apparent affinity an incubation can report, the
    value an infinitely slow dissociator reads: ln2/(kon t) for a one-step
    read, the Motulsky-Mahan/Cheng-Prusoff value for a described tracer
    competition (:func:`~tracker.kinetics.assay.assay_floor`); an IC50 read is
    compared with the floor times (1 + L/Kd).

    * Within ``floor_factor`` of the floor (design choice 2x) and not far
      below it: one ``affinity-underestimate`` finding per compound naming
      every such reading.  More readings strengthen it: readings at the floor
      at two or more incubation times (the value tracks 1/t, the signature
      of a dissociation slower than the longest read) raise the evidence
      level from 0 to 1.
    * More than ``below_floor_factor`` below the floor: no compound with
      that kon can read so tight, so the reading contradicts the kon used
      (or the value, its unit or its incubation is wrong).  Reported as
      ``potency-below-floor``, a data or kon question, never as slow binding.
    """
    n = len(rows)
    if n == 0:
        return _empty()
    value = _num(rows, "value_M")
    t = _num(rows, "incubation_s")
    kon = _num(rows, "kon_per_M_s")
    factor = _col(floor_factor, n)
    below_f = _col(below_floor_factor, n)
    floor, comp = _floors(rows)
    below = np.isfinite(floor) & (value * below_f < floor)
    at = np.isfinite(floor) & (value <= factor * floor) & ~below
    if not (at.any() or below.any()):
        return _empty()
    info = _rows(rows, ["compound_id", "stage", "assay", "readout", "kon_source", "potency_id"])
    records = []
    cids = rows["compound_id"].to_numpy(dtype=object)
    for mask, rule in ((at, "affinity-underestimate"), (below, "potency-below-floor")):
        if not mask.any():
            continue
        idx = np.nonzero(mask)[0]
        order = pd.Series(idx).groupby(pd.Series(cids[idx]), sort=False)
        for cid, members in order:
            members = members.to_numpy()
            first = members[np.argmin(value[members] / floor[members])]  # the reading closest to / farthest below its floor
            r = info[first]
            times = sorted({float(t[j]) for j in members})
            items = [f"{info[j].assay} {info[j].readout} {fmt_conc(value[j])} after {fmt_time(t[j])} "
                     f"({fmt_fold(value[j] / floor[j])} its floor {fmt_conc(floor[j])})" for j in members]
            how = "tracer competition" if comp[first] else "ln2/(kon·t)"
            ids = sorted(int(info[j].potency_id) for j in members if info[j].potency_id is not None)
            if rule == "affinity-underestimate":
                tracks = len(times) >= 2
                level = 1 if tracks else 0
                sev = severity_from(np.array([level]), np.array([r.stage], dtype=object), likely=True)[0]
                strength = (f"; readings at {len(times)} incubation times all track the floor, the signature of a dissociation "
                            "slower than the longest read" if tracks else "")
                msg = (
                    f"likely underestimated: {'; '.join(items)} sit at the assay floor ({how}, kon {_fmt.rate2(kon[first])}, "
                    f"{r.kon_source}): a slow dissociator cannot read tighter at these incubations, so the true affinity may be "
                    f"much tighter{strength}; residence time not measured"
                )
                prompt = (
                    f"Re-test {r.assay} at a longer incubation (a Ki-shift check) or measure residence time before the "
                    f"{next_stage(r.stage)} decision"
                )
                caution = CAUTION_AFFINITY
                data = _data(likely=True, evidence="assay-floor", potency_id=r.potency_id, potency_ids=ids, assay=r.assay,
                             readout=r.readout, value_M=value[first], incubation_s=t[first], assay_floor_M=floor[first],
                             floor_ratio=value[first] / floor[first], floor_factor=factor[first], kon_per_M_s=kon[first],
                             kon_source=r.kon_source, n_readings=len(members), n_incubations=len(times))
            else:
                sev = severity_from(np.array([0]), np.array([r.stage], dtype=object))[0]
                msg = (
                    f"{'; '.join(items)}: tighter than any compound with kon {_fmt.rate2(kon[first])} ({r.kon_source}) can read "
                    f"at that incubation ({how}). This contradicts the kon used for the floor, or the value, its unit or its "
                    "incubation is wrong; it is a data or kon question, not evidence of slow binding"
                )
                prompt = f"Check the value, unit and incubation of {r.assay}, or measure kon, before the {next_stage(r.stage)} decision"
                caution = None
                data = _data(potency_id=r.potency_id, potency_ids=ids, assay=r.assay, readout=r.readout, value_M=value[first],
                             incubation_s=t[first], assay_floor_M=floor[first], floor_ratio=value[first] / floor[first],
                             below_floor_factor=below_f[first], kon_per_M_s=kon[first], kon_source=r.kon_source)
            records.append({"compound_id": cid, "rule": rule, "severity": sev, "message": msg, "prompt": prompt,
                            "caution": caution, "data": data})
    return _frame(records)


def check_tight_binding(rows: pd.DataFrame, *, tight_binding_factor=2.0) -> pd.DataFrame:
    """``tight-binding-limit``: a reading near the titration limit set by the target concentration in the well.

    ``rows``: potency rows with ``compound_id``, ``stage``, ``potency_id``,
    ``assay``, ``readout``, ``value_M``, ``format``, ``target_conc_M`` and the
    tracer columns.  An IC50 cannot fall below half the active target
    concentration [E]/2 (Morrison 1969, Biochim Biophys Acta 185:269-286,
    volume and pages from memory; IC50 = Kapp + [E]/2, Copeland et al. 1995,
    Bioorg Med Chem Lett 5:1947-1952); a Ki from a described tracer
    competition has the limit [E]/2/(1 + L/Kd).  A reading within
    ``tight_binding_factor`` of its limit (the issue's 2x) is a likely
    underestimate: the true affinity may be much tighter than reported.
    One finding per compound, naming every such reading.
    """
    n = len(rows)
    if n == 0 or "target_conc_M" not in rows.columns:
        return _empty()
    e = _num(rows, "target_conc_M")
    value = _num(rows, "value_M")
    L = _num(rows, "tracer_conc_M")
    kd_t = _num(rows, "tracer_kd_M")
    fmt = rows["format"].astype(object).to_numpy()
    readout = rows["readout"].astype(object).to_numpy()
    limit = e / 2.0
    cp = (fmt == "competition-binding") & (readout != "IC50") & np.isfinite(L) & (L > 0) & np.isfinite(kd_t) & (kd_t > 0)
    limit = np.where(cp, limit / (1.0 + np.where(cp, L / np.where(cp, kd_t, 1.0), 0.0)), limit)
    factor = _col(tight_binding_factor, n)
    fires = np.isfinite(limit) & (limit > 0) & np.isfinite(value) & (value <= factor * limit)
    if not fires.any():
        return _empty()
    idx = np.nonzero(fires)[0]
    info = _rows(rows, ["compound_id", "stage", "assay", "readout", "potency_id"])
    cids = rows["compound_id"].to_numpy(dtype=object)
    records = []
    for cid, members in pd.Series(idx).groupby(pd.Series(cids[idx]), sort=False):
        members = members.to_numpy()
        first = members[np.argmin(value[members] / limit[members])]
        r = info[first]
        items = [f"{info[j].assay} {info[j].readout} {fmt_conc(value[j])} with {fmt_conc(e[j])} target in the well "
                 f"({fmt_fold(value[j] / limit[j])} the limit {fmt_conc(limit[j])})" for j in members]
        sev = severity_from(np.array([1]), np.array([r.stage], dtype=object), likely=True)[0]
        msg = (
            f"likely underestimated (tight binding): {'; '.join(items)}: a potency within {factor[first]:g}× of the titration "
            "limit ([E]/2 for an IC50, Morrison) reports the target concentration, not the affinity; the true affinity may be "
            "much tighter"
        )
        prompt = (f"Refit {r.assay} with the Morrison tight-binding equation (krt fit morrison) or re-run it at a lower target "
                  f"concentration before the {next_stage(r.stage)} decision")
        ids = sorted(int(info[j].potency_id) for j in members if info[j].potency_id is not None)
        records.append({
            "compound_id": cid, "rule": "tight-binding-limit", "severity": sev, "message": msg, "prompt": prompt,
            "caution": CAUTION_AFFINITY,
            "data": _data(likely=True, evidence="tight-binding", potency_id=r.potency_id, potency_ids=ids, assay=r.assay,
                          readout=r.readout, value_M=value[first], target_conc_M=e[first], titration_limit_M=limit[first],
                          limit_ratio=value[first] / limit[first], tight_binding_factor=factor[first]),
        })
    return _frame(records)


def check_conflicting_kinetics(kinetics: pd.DataFrame, runs: pd.DataFrame, stages: pd.Series, *, conflict_fold=3.0) -> pd.DataFrame:
    """``conflicting-kinetics``: kinetic runs of one compound whose residence times differ beyond ``conflict_fold``.

    ``kinetics``: the evidence model's selection (one row per compound, with
    ``conflict``, ``koff_spread_fold``, ``koff_per_s``,
    ``kinetic_measurement_id``); ``runs``: every run (``compound_id``,
    ``kinetic_measurement_id``, ``method``, ``residence_time_s``);
    ``stages``: compound_id -> stage.  Evidence level 1 (a decision on the
    data is needed), scored with the stage.  Until a lead resolves the
    conflict the grade uses the conservative value: the longest residence
    time, which predicts the largest potency artefact.
    """
    if kinetics is None or kinetics.empty:
        return _empty()
    c = kinetics[kinetics["conflict"].fillna(False).astype(bool)]
    if c.empty:
        return _empty()
    fold = _col(conflict_fold, len(c)) if not isinstance(conflict_fold, pd.Series) else c["compound_id"].map(conflict_fold).fillna(3.0).to_numpy(float)
    st_ = c["compound_id"].map(stages).to_numpy(dtype=object)
    sev = severity_from(np.ones(len(c), int), st_)
    records = []
    for k, r in enumerate(c.itertuples(index=False)):
        mine = runs[runs["compound_id"] == r.compound_id].sort_values("residence_time_s")
        items = [f"{fmt_time(v)} ({m} #{int(i)})" for v, m, i in zip(mine["residence_time_s"], mine["method"], mine["kinetic_measurement_id"])]
        msg = (
            f"{len(mine)} kinetic measurements disagree: residence times {', '.join(items)} differ {fmt_fold(r.koff_spread_fold)}, "
            f"beyond the {fold[k]:g}-fold conflict limit; until resolved the grade uses the longest, {fmt_time(1 / r.koff_per_s)} "
            "(the riskier value for reading potency)"
        )
        records.append({
            "compound_id": r.compound_id, "rule": "conflicting-kinetics", "severity": sev[k], "message": msg,
            "prompt": (f"Resolve which kinetic measurement stands (repeat it, or retire the faulty run) before the "
                       f"{next_stage(st_[k])} decision"),
            "caution": None,
            "data": _data(kinetic_measurement_ids=[int(i) for i in mine["kinetic_measurement_id"]],
                          residence_times_s=[float(v) for v in mine["residence_time_s"]], spread_fold=r.koff_spread_fold,
                          conflict_fold=fold[k], conservative_residence_time_s=1 / r.koff_per_s,
                          kinetic_measurement_id=r.kinetic_measurement_id),
        })
    return _frame(records)


# ----------------------------------------------------------------------------- residence-time-unmeasured
def check_residence_time_unmeasured(compounds: pd.DataFrame) -> pd.DataFrame:
    """``residence-time-unmeasured``.

    ``compounds``: ``compound_id``, ``stage``, ``has_kinetics`` (bool),
    ``slow_evidence`` (text naming the evidence of slow binding, empty/None
    when there is none) and optional ``suggested_assay``.

    * advanced-lead or later without a kinetic measurement: ``high``
      (common practice: measure the kinetics of leads at the advanced-lead
      stage at the latest);
    * lead-optimization: ``moderate``, only with evidence of slow binding;
    * earlier stages: nothing.
    """
    if len(compounds) == 0:
        return _empty()
    stage_i = _stage_index(compounds["stage"])
    has = compounds["has_kinetics"].fillna(False).astype(bool).to_numpy()
    ev = compounds["slow_evidence"] if "slow_evidence" in compounds.columns else pd.Series([None] * len(compounds))
    ev = np.array([e if isinstance(e, str) else "" for e in ev], dtype=object)
    late = (stage_i >= _ADVANCED) & ~has
    lead_opt = (stage_i == _LEAD_OPT) & ~has & (ev != "")
    fires = late | lead_opt
    if not fires.any():
        return _empty()
    assays = (np.array([a if isinstance(a, str) else "" for a in compounds["suggested_assay"]], dtype=object)
              if "suggested_assay" in compounds.columns else np.full(len(compounds), "", dtype=object))
    stages = compounds["stage"].to_numpy(dtype=object)
    cids = compounds["compound_id"].to_numpy(dtype=object)
    records = []
    for i in np.nonzero(fires)[0]:
        stage = stages[i]
        assay = assays[i] or "competition kinetics, jump dilution or SPR"
        if late[i]:
            msg = f"{stage} compound without any kinetic measurement: residence time, kon and the equilibrium affinity are unknown"
            if ev[i]:
                msg += f"; evidence of slow binding: {ev[i]}"
            sev = "high"
        else:
            msg = f"lead-optimization compound with evidence of slow binding ({ev[i]}) but no kinetic measurement"
            sev = "moderate"
        records.append({
            "compound_id": cids[i], "rule": "residence-time-unmeasured", "severity": sev,
            "message": msg, "prompt": f"Measure residence time ({assay}) before the {next_stage(stage)} review",
            "caution": None,
            "data": _data(stage=stage, slow_evidence=ev[i] or None, suggested_assay=assay),
        })
    return _frame(records)


# ----------------------------------------------------------------------------- duration-mismatch
_LIMIT_PROMPTS = {
    "engagement_threshold": "Decide whether exposure or affinity can reach the engagement threshold before advancing; model higher free exposure or pursue tighter binders",
    "onset_max": "Decide whether the slow onset is acceptable for the {profile} profile, or pursue faster-binding analogues",
    "duration_min": "Model repeat dosing before committing to a {profile} profile; consider longer-residence analogues",
    "offset_max": "Review the prolonged offset against the {profile} profile (next-day effects) before the {next} decision",
    "dosing_interval": "Model repeat dosing at the intended interval before committing to a {profile} profile",
}
_PROFILE_COLUMNS = ("engagement_threshold", "onset_max_s", "duration_min_s", "offset_max_s", "dosing_interval_s")


_CHECKED_METRICS = REGIMEN_METRICS


def _metrics(kon, koff, route, cmax, tmax, hl, thr, tau, wanted=_CHECKED_METRICS, thl=None, fac=1.0) -> dict[str, np.ndarray]:
    """The judged engagement (:func:`tracker.rules.engagement.regimen_engagement`): one dose, or the regimen at
    steady state where ``tau`` is set; only ``wanted`` computed."""
    return regimen_engagement(kon, koff, route, cmax, tmax, hl, thr, tau, target_half_life=thl,
                              bound_degradation_factor=fac, metrics=wanted)


def check_duration_mismatch(frame: pd.DataFrame, *, default_engagement_threshold=0.5, bound_target_degradation_factor=1.0) -> pd.DataFrame:
    """``duration-mismatch``: simulated engagement against the program's intended profile.

    ``frame``: one row per compound with ``compound_id``, ``stage``,
    ``intended_profile``, the program limits ``engagement_threshold``,
    ``onset_max_s``, ``duration_min_s``, ``offset_max_s``,
    ``dosing_interval_s`` (NaN = not set), the kinetics ``kon_per_M_s``,
    ``koff_per_s``, ``koff_low_per_s``, ``koff_high_per_s`` and ``kd_source``
    (text), and the PK ``route``, ``free_cmax_M``, ``tmax_s``,
    ``half_life_s``, ``species``, ``pk_id``, ``kinetic_measurement_id``.

    Engagement d(theta)/dt = kon C (1 - theta) - koff theta, with target
    turnover where the program gives ``target_half_life_s``
    (:func:`tracker.rules.engagement.regimen_engagement`, vectorised).  Without
    a dosing interval one dose is judged; with one, the regimen at steady
    state (time above threshold per interval, trough, offset after the last
    dose); the message and ``data.regimen`` say which.  Limits: onset <=
    ``onset_max``, time above threshold >= ``duration_min`` (per interval:
    at most the interval), last time above threshold <= ``offset_max``; with a
    dosing interval, the steady-state trough must stay above the threshold when
    no ``duration_min`` shorter than the interval allows a gap.  Where the
    residence time exceeds the bound target's half-life the message says that
    turnover, not dissociation, sets the duration (``data.duration_set_by``).  A compound
    that never reaches the threshold gets one finding for that.  Severity:
    ``high`` at candidate or later, ``moderate`` at lead-optimization and
    advanced-lead, ``low`` earlier.  At candidate or later, missing kinetics,
    affinity or PK is reported instead (``moderate``).  A program without any
    profile limit gets no duration findings.  Where the koff has a 95%
    interval the failing metric is re-simulated at its ends.
    """
    n = len(frame)
    if n == 0:
        return _empty()
    stage_i = _stage_index(frame["stage"])
    koff = _num(frame, "koff_per_s")
    kon = _num(frame, "kon_per_M_s")
    cmax = _num(frame, "free_cmax_M")
    hl = _num(frame, "half_life_s")
    tmax = _num(frame, "tmax_s")
    route = np.array([r if isinstance(r, str) else "" for r in frame["route"].to_numpy(dtype=object)], dtype=object) \
        if "route" in frame.columns else np.full(n, "", dtype=object)
    thr_prog = _num(frame, "engagement_threshold")
    onset_max = _num(frame, "onset_max_s")
    dur_min = _num(frame, "duration_min_s")
    off_max = _num(frame, "offset_max_s")
    tau = _num(frame, "dosing_interval_s")
    thl = _num(frame, "target_half_life_s")
    fac = _col(bound_target_degradation_factor, n)
    has_limits = np.isfinite(onset_max) | np.isfinite(dur_min) | np.isfinite(off_max) | np.isfinite(tau)
    thr = np.where(np.isfinite(thr_prog), thr_prog, _col(default_engagement_threshold, n))
    has_kin = np.isfinite(koff) & (koff > 0)
    has_aff = np.isfinite(kon) & (kon > 0)
    with np.errstate(invalid="ignore", divide="ignore"):  # a tmax the simulation refuses counts as no usable PK
        oral_ok = (route == "oral") & np.isfinite(tmax) & (tmax > 0) & ~(tmax * math.log(2) / hl > MAX_TMAX_KE)
    has_pk = np.isfinite(cmax) & (cmax > 0) & np.isfinite(hl) & (hl > 0) & (oral_ok | (route == "iv"))
    can = has_kin & has_aff & has_pk & has_limits
    records: list[dict] = []
    profile = np.array([p if isinstance(p, str) and p else "intended" for p in
                        (frame["intended_profile"].to_numpy(dtype=object) if "intended_profile" in frame.columns else [None] * n)], dtype=object)
    stages = frame["stage"].to_numpy(dtype=object)
    info = _rows(frame, ["compound_id", "species", "kd_source", "pk_id", "kinetic_measurement_id"])
    # -- missing evidence at candidate or later
    late = stage_i >= _CANDIDATE
    for i in np.nonzero(late & ~can & has_limits)[0]:  # a program without an intended profile: nothing to compare
        missing = []
        if not has_kin[i]:
            missing.append("kinetic measurement (residence time)")
        elif not has_aff[i]:
            missing.append("affinity (kon or KD)")
        if not has_pk[i]:
            missing.append("PK profile (free Cmax, tmax, half-life)")
        stage = stages[i]
        records.append({
            "compound_id": info[i].compound_id, "rule": "duration-mismatch", "severity": "moderate",
            "message": f"cannot check engagement against the {profile[i]} profile at {stage}: missing {', '.join(missing)}",
            "prompt": f"Provide the missing {' and '.join(m.split(' (')[0] for m in missing)} and simulate engagement before the {next_stage(stage)} review",
            "caution": None,
            "data": _data(missing=missing),
        })
    if can.any():
        ci = np.nonzero(can)[0]
        met = _metrics(kon[ci], koff[ci], route[ci], cmax[ci], tmax[ci], hl[ci], thr[ci], tau[ci], thl=thl[ci], fac=fac[ci])
        fails = _limit_failures(met, thr[ci], onset_max[ci], dur_min[ci], off_max[ci], tau[ci])
        if fails:
            _intervals(fails, frame, ci, kon, route, cmax, tmax, hl, thr, tau, thl, fac)
        set_by = np.atleast_1d(duration_set_by(koff[ci], thl[ci], fac[ci]))
        sev_by_stage = np.where(stage_i >= _CANDIDATE, "high", np.where(stage_i >= _LEAD_OPT, "moderate", "low"))
        for f in fails:
            i = ci[f["row"]]
            stage = stages[i]
            r = info[i]
            species = r.species if isinstance(r.species, str) else ""
            kd_source = r.kd_source if isinstance(r.kd_source, str) else "measured"
            context = (
                f"{route[i]} {species} PK (free Cmax {fmt_conc(cmax[i])}, t½ {fmt_time(hl[i])}"
                + (f", tmax {fmt_time(tmax[i])}" if route[i] == "oral" else "")
                + f"), RT {fmt_time(1 / koff[i])}, KD {fmt_conc(koff[i] / kon[i])} ({kd_source}), "
                f"threshold {_fmt.pct(thr[i])}" + ("" if np.isfinite(thr_prog[i]) else " (default; the program sets none)")
            )
            j = f["row"]
            regimen = met["regimen"][j]
            if np.isfinite(thl[i]):
                context += f", target t½ {fmt_time(thl[i])}"
            turnover_note = ""
            if set_by[j] == "turnover":
                turnover_note = (f"; target turnover (t½ {fmt_time(thl[i] / fac[i])}), not dissociation (RT {fmt_time(1 / koff[i])}), "
                                 "sets the duration")
            caution = CAUTION_OFFSET if f["limit"] == "offset_max" else CAUTION_NOT_DOSING_ADVICE
            records.append({
                "compound_id": r.compound_id, "rule": "duration-mismatch", "severity": sev_by_stage[i],
                "message": f"{f['text']}{f.get('ci_text', '')} for the {profile[i]} profile ({regimen}){turnover_note}; "
                           f"simulated with {context}",
                "prompt": _LIMIT_PROMPTS[f["limit"]].format(profile=profile[i], next=next_stage(stage)),
                "caution": caution,
                "data": _data(
                    limit=f["limit"], limit_value=f["limit_value"], simulated_value=f["value"], excess=f["excess"],
                    simulated_value_ci95=f.get("ci"), engagement_threshold=thr[i],
                    onset_s=met["onset_s"][f["row"]], offset_s=met["offset_s"][f["row"]],
                    duration_above_threshold_s=met["duration_above_threshold_s"][f["row"]],
                    peak_occupancy=met["peak_occupancy"][f["row"]], trough_occupancy=met["trough_occupancy"][f["row"]],
                    residence_time_s=1 / koff[i], kd_M=koff[i] / kon[i], pk_id=r.pk_id,
                    kinetic_measurement_id=r.kinetic_measurement_id,
                    regimen="steady state" if np.isfinite(tau[i]) else "single dose", regimen_text=regimen,
                    dosing_interval_s=tau[i], target_half_life_s=thl[i], duration_set_by=set_by[j],
                ),
            })
    return _frame(records)


_METRIC_OF_LIMIT = {"engagement_threshold": "peak_occupancy", "onset_max": "onset_s", "duration_min": "duration_above_threshold_s",
                    "offset_max": "offset_s", "dosing_interval": "trough_occupancy"}


def _limit_failures(met, thr, onset_max, dur_min, off_max, tau) -> list[dict]:
    """One dict per failed limit: row (within the simulated rows), limit, value, limit_value, excess, text."""
    onset, offset, dur = met["onset_s"], met["offset_s"], met["duration_above_threshold_s"]
    peak, trough = met["peak_occupancy"], met["trough_occupancy"]
    regimen = np.isfinite(tau)
    # one dose: never above threshold = no onset; a regimen: the steady-state peak stays below it
    never = np.where(regimen, ~(peak >= thr), ~np.isfinite(onset))
    out = []
    pct = _fmt.pct
    for j in range(onset.size):
        if never[j]:
            out.append({"row": j, "limit": "engagement_threshold", "value": peak[j], "limit_value": thr[j],
                        "excess": peak[j] - thr[j],
                        "text": f"engagement never reaches the {pct(thr[j])} threshold (peak occupancy {pct(peak[j])})"})
            continue
        if np.isfinite(onset_max[j]) and not onset[j] <= onset_max[j]:
            if not np.isfinite(onset[j]):  # a regimen that gets there only after more doses than simulated
                out.append({"row": j, "limit": "onset_max", "value": onset[j], "limit_value": onset_max[j], "excess": math.nan,
                            "text": f"onset not reached within {ONSET_DOSES} doses, beyond the {fmt_time(onset_max[j])} limit"})
                continue
            out.append({"row": j, "limit": "onset_max", "value": onset[j], "limit_value": onset_max[j],
                        "excess": onset[j] - onset_max[j],
                        "text": f"onset {fmt_time(onset[j])} exceeds the {fmt_time(onset_max[j])} limit by {fmt_time(onset[j] - onset_max[j])} ({fmt_fold(onset[j] / onset_max[j])})"})
        if regimen[j]:
            # per interval at steady state; a minimum of a whole interval or more is continuous cover: the trough check
            if np.isfinite(dur_min[j]) and dur_min[j] < tau[j] and dur[j] < dur_min[j]:
                out.append({"row": j, "limit": "duration_min", "value": dur[j], "limit_value": dur_min[j],
                            "excess": dur[j] - dur_min[j],
                            "text": f"time above threshold {fmt_time(dur[j])} per {fmt_time(tau[j])} interval at steady state falls "
                                    f"{fmt_time(dur_min[j] - dur[j])} short of the {fmt_time(dur_min[j])} minimum ({fmt_fold(dur[j] / dur_min[j])})"})
        elif np.isfinite(dur_min[j]) and dur[j] < dur_min[j]:
            out.append({"row": j, "limit": "duration_min", "value": dur[j], "limit_value": dur_min[j],
                        "excess": dur[j] - dur_min[j],
                        "text": f"time above threshold {fmt_time(dur[j])} falls {fmt_time(dur_min[j] - dur[j])} short of the {fmt_time(dur_min[j])} minimum ({fmt_fold(dur[j] / dur_min[j])}) after one dose"})
        if np.isfinite(off_max[j]) and offset[j] > off_max[j]:
            after = "the last dose" if regimen[j] else "dosing"
            out.append({"row": j, "limit": "offset_max", "value": offset[j], "limit_value": off_max[j],
                        "excess": offset[j] - off_max[j],
                        "text": f"offset {fmt_time(offset[j])} after {after} exceeds the {fmt_time(off_max[j])} limit by {fmt_time(offset[j] - off_max[j])} ({fmt_fold(offset[j] / off_max[j])})"})
        gap_allowed = np.isfinite(dur_min[j]) and dur_min[j] < tau[j]
        if np.isfinite(tau[j]) and np.isfinite(trough[j]) and trough[j] < thr[j] and not gap_allowed:
            out.append({"row": j, "limit": "dosing_interval", "value": trough[j], "limit_value": thr[j],
                        "excess": trough[j] - thr[j],
                        "text": f"at steady state on a {fmt_time(tau[j])} dosing interval occupancy falls to {pct(trough[j])}, below the {pct(thr[j])} threshold"})
    return out


def _intervals(fails, frame, ci, kon, route, cmax, tmax, hl, thr, tau, thl, fac) -> None:
    """Re-simulate the failing metric at koff_low and koff_high (kon fixed) and attach the interval."""
    k_lo = _num(frame, "koff_low_per_s")
    k_hi = _num(frame, "koff_high_per_s")
    rows = sorted({f["row"] for f in fails if np.isfinite(k_lo[ci[f["row"]]]) and np.isfinite(k_hi[ci[f["row"]]])})
    if not rows:
        return
    idx = ci[np.asarray(rows)]
    both = np.concatenate([idx, idx])  # both interval ends in one simulation call per dosing group
    wanted = tuple(sorted({_METRIC_OF_LIMIT[f["limit"]] for f in fails}))  # only the metrics that failed
    met = _metrics(kon[both], np.concatenate([k_lo[idx], k_hi[idx]]), route[both], cmax[both], tmax[both], hl[both], thr[both], tau[both],
                   wanted, thl=thl[both], fac=fac[both])
    ends = [{k: v[: idx.size] for k, v in met.items()}, {k: v[idx.size :] for k, v in met.items()}]
    pos = {r: p for p, r in enumerate(rows)}
    for f in fails:
        p = pos.get(f["row"])
        if p is None:
            continue
        key = _METRIC_OF_LIMIT[f["limit"]]
        a, b = ends[0][key][p], ends[1][key][p]
        lo, hi = (np.fmin(a, b), np.fmax(a, b))
        f["ci"] = [lo, hi]
        if key.endswith("_s"):
            f["ci_text"] = _fmt_ci(lo, hi, fmt_time)
        else:
            f["ci_text"] = _fmt_ci(lo, hi, _fmt.pct)
