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
from ..kinetics.engagement import engagement_metrics
from .. import fmt as _fmt
from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time

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
_FORMAT_NOTE = {
    "binding": "",
    "competition-binding": "",
    "enzyme": "enzyme format approximated as a one-step binding read",
    "functional": "functional format approximated as a one-step binding read",
}


def predict_apparent(rows: pd.DataFrame) -> pd.DataFrame:
    """Predicted fold shift (apparent/true) of each potency value at its own incubation.

    Columns used: ``value_M``, ``incubation_s``, ``format``, ``readout``,
    ``tracer_conc_M``, ``tracer_kd_M``, ``tracer_residence_time_s``,
    ``koff_per_s``, ``kon_per_M_s``, ``kd_M``, ``koff_low_per_s``,
    ``koff_high_per_s``.  Rows without ``koff_per_s`` get NaN.

    ``competition-binding`` rows with the tracer's concentration, KD and
    residence time are simulated as tracer competition (Motulsky & Mahan 1984,
    apparent Ki by Cheng & Prusoff 1973); every other row as a one-step
    (saturation) binding read, which for enzyme and functional formats is an
    approximation and says so in ``note``.  The competitor's KD is the
    measured one, else koff/kon, else the reported value corrected by the
    saturation fold.  Fold intervals re-evaluate the fold at ``koff_low`` and
    ``koff_high`` (kon held at its estimate).

    Returns a frame on the same index: ``fold_shift``, ``fold_shift_low``,
    ``fold_shift_high``, ``corrected_affinity_M``, ``kd_used_M``,
    ``simulated_as`` (saturation|competition), ``note``.
    """
    n = len(rows)
    out = pd.DataFrame(index=rows.index)
    koff = _num(rows, "koff_per_s")
    value = _num(rows, "value_M")
    t = _num(rows, "incubation_s")
    L = _num(rows, "tracer_conc_M")
    kd_t = _num(rows, "tracer_kd_M")
    rt_t = _num(rows, "tracer_residence_time_s")
    kon = _num(rows, "kon_per_M_s")
    kd = _num(rows, "kd_M")
    k_lo = _num(rows, "koff_low_per_s")
    k_hi = _num(rows, "koff_high_per_s")
    fmt = rows["format"].astype(object).to_numpy() if "format" in rows.columns else np.full(n, "binding", object)
    readout = rows["readout"].astype(object).to_numpy() if "readout" in rows.columns else np.full(n, "KD", object)
    ok = np.isfinite(koff) & (koff > 0) & np.isfinite(value) & (value > 0) & np.isfinite(t) & (t > 0)
    tracer_ok = np.isfinite(L) & (L > 0) & np.isfinite(kd_t) & (kd_t > 0) & np.isfinite(rt_t) & (rt_t > 0)
    comp = ok & (fmt == "competition-binding") & tracer_ok
    sat = ok & ~comp
    fold = np.full(n, np.nan)
    f_lo = np.full(n, np.nan)
    f_hi = np.full(n, np.nan)
    kd_used = np.full(n, np.nan)
    note = np.array([_FORMAT_NOTE.get(f, "approximated as a one-step binding read") for f in fmt], dtype=object)
    note[(fmt == "competition-binding") & ~tracer_ok] = "tracer not fully described: approximated as a one-step binding read"
    note[~ok] = ""
    if sat.any():
        i = np.nonzero(sat)[0]
        # point estimate and both interval ends in one vectorised call; fold falls as koff rises
        j_lo = i[np.isfinite(k_lo[i]) & (k_lo[i] > 0)]
        j_hi = i[np.isfinite(k_hi[i]) & (k_hi[i] > 0)]
        x = saturation_fold(np.concatenate([koff[i] * t[i], k_lo[j_lo] * t[j_lo], k_hi[j_hi] * t[j_hi]]))
        fold[i] = x[: i.size]
        f_hi[j_lo] = x[i.size : i.size + j_lo.size]
        f_lo[j_hi] = x[i.size + j_lo.size :]
        kd_used[i] = np.where(np.isfinite(kd[i]), kd[i], np.where(np.isfinite(kon[i]) & (kon[i] > 0), koff[i] / kon[i], value[i] / fold[i]))
    if comp.any():
        i = np.nonzero(comp)[0]
        k_t = 1.0 / rt_t[i]
        ki_reported = np.where(readout[i] == "IC50", value[i] / (1.0 + L[i] / kd_t[i]), value[i])
        kd_i = np.where(np.isfinite(kd[i]), kd[i], np.where(np.isfinite(kon[i]) & (kon[i] > 0), koff[i] / kon[i], np.nan))
        est = ~np.isfinite(kd_i)
        if est.any():
            kd_i[est] = ki_reported[est] / saturation_fold(koff[i][est] * t[i][est])
        kd_used[i] = kd_i
        kon_i = koff[i] / kd_i
        m_lo = np.isfinite(k_lo[i]) & (k_lo[i] > 0)
        m_hi = np.isfinite(k_hi[i]) & (k_hi[i] > 0)
        rows_ = np.concatenate([i, i[m_lo], i[m_hi]])
        k_all = np.concatenate([koff[i], k_lo[i][m_lo], k_hi[i][m_hi]])
        kon_all = np.concatenate([kon_i, kon_i[m_lo], kon_i[m_hi]])
        res = apparent_affinity(k_all / kon_all, k_all, t[rows_], format="competition", tracer_kd=kd_t[rows_],
                                tracer_koff=1.0 / rt_t[rows_], tracer_conc=L[rows_])  # one call: point and interval ends
        n_i, n_lo = i.size, int(m_lo.sum())
        fold[i] = res.fold[:n_i]
        f_hi[i[m_lo]] = res.fold[n_i : n_i + n_lo]
        f_lo[i[m_hi]] = res.fold[n_i + n_lo :]
    out["fold_shift"] = fold
    out["fold_shift_low"] = np.fmin(f_lo, f_hi)
    out["fold_shift_high"] = np.fmax(f_lo, f_hi)
    out["corrected_affinity_M"] = value / fold
    out["kd_used_M"] = kd_used
    out["simulated_as"] = np.where(comp, "competition", np.where(sat, "saturation", None))
    out["note"] = note
    return out


def _min_incubation(rows: pd.DataFrame, pred: pd.DataFrame, tolerance: np.ndarray) -> np.ndarray:
    """Minimum incubation for the rows given (same format split as :func:`predict_apparent`)."""
    n = len(rows)
    out = np.full(n, np.nan)
    if n == 0:
        return out
    koff = _num(rows, "koff_per_s")
    kd = pred["kd_used_M"].to_numpy(float)
    comp = (pred["simulated_as"] == "competition").to_numpy()
    sat = ~comp
    if sat.any():
        out[sat] = min_incubation(kd[sat], koff[sat], tolerance=tolerance[sat])
    if comp.any():
        L = _num(rows, "tracer_conc_M")[comp]
        kd_t = _num(rows, "tracer_kd_M")[comp]
        k_t = 1.0 / _num(rows, "tracer_residence_time_s")[comp]
        out[comp] = min_incubation(kd[comp], koff[comp], tolerance=tolerance[comp], format="competition",
                                   tracer_kd=kd_t, tracer_koff=k_t, tracer_conc=L)
    return out


# ----------------------------------------------------------------------------- affinity-underestimate (RT known)
def check_affinity_underestimate(
    rows: pd.DataFrame,
    *,
    incubation_multiple=2.0,
    fold_tolerance=1.25,
    fold_moderate=3.0,
    fold_high=10.0,
) -> pd.DataFrame:
    """``affinity-underestimate`` for potency values of compounds whose residence time is measured.

    ``rows``: one row per potency value with ``compound_id``, ``stage``,
    ``potency_id``, ``assay``, ``readout``, ``value_M``, ``incubation_s``,
    ``format``, tracer columns, and the compound's kinetics ``koff_per_s``,
    ``kon_per_M_s``, ``kd_M``, ``koff_low_per_s``, ``koff_high_per_s``,
    ``kinetic_measurement_id`` (optional ``rt_lower_bound``).  Columns from
    :func:`predict_apparent` are used when present, else computed.

    Fires where the incubation is shorter than ``incubation_multiple`` x RT
    (common practice: 2 x RT) **and** the predicted fold shift exceeds
    ``fold_tolerance`` (common practice: 1.25).  Severity from the shift
    (``fold_moderate``, ``fold_high``) and the stage.

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
    pred = rows if "fold_shift" in rows.columns else pd.concat([rows, predict_apparent(rows)], axis=1)
    koff = _num(pred, "koff_per_s")
    t = _num(pred, "incubation_s")
    fold = _num(pred, "fold_shift")
    mult = _col(incubation_multiple, n)
    tol = _col(fold_tolerance, n)
    f_mod = _col(fold_moderate, n)
    f_high = _col(fold_high, n)
    rt = 1.0 / koff
    fires = np.isfinite(fold) & (t < mult * rt) & (fold > tol)
    if not fires.any():
        return _empty()
    sel = pred[fires]
    idx = np.nonzero(fires)[0]
    level = np.where(fold[idx] >= f_high[idx], 2, np.where(fold[idx] >= f_mod[idx], 1, 0))
    severity = severity_from(level, sel["stage"].to_numpy())
    min_inc = _min_incubation(sel, sel, tol[idx])
    thumb = mult[idx] * rt[idx]
    recommended = np.fmax(min_inc, thumb)
    lower_bound = sel["rt_lower_bound"].fillna(False).astype(bool).to_numpy() if "rt_lower_bound" in sel.columns else np.zeros(idx.size, bool)
    records = []
    names = ["compound_id", "stage", "assay", "readout", "value_M", "fold_shift_low", "fold_shift_high", "note",
             "corrected_affinity_M", "potency_id", "kinetic_measurement_id", "simulated_as"]
    for k, r in enumerate(_rows(sel, names)):
        i = idx[k]
        f, lo, hi = fold[i], r.fold_shift_low, r.fold_shift_high
        rt_text = ("≥ " if lower_bound[k] else "") + fmt_time(rt[i])
        at_least = "at least " if lower_bound[k] else ""
        note = f"; {r.note}" if r.note else ""
        msg = (
            f"{r.assay} {r.readout} {fmt_conc(r.value_M)} after {fmt_time(t[i])} is predicted to read "
            f"{at_least}{fmt_fold(f)} too weak{_fmt_ci(lo, hi, fmt_fold)} for residence time {rt_text}: the incubation is "
            f"{fmt_fold(t[i] / rt[i])} RT (rule ≥ {mult[i]:g}× RT); equilibrium {r.readout} ≈ {fmt_conc(r.corrected_affinity_M)}; "
            f"reads within {tol[i]:g}-fold only after {fmt_time(min_inc[k])}{note}"
        )
        prompt = (
            f"Re-run {r.assay} with ≥ {fmt_time(recommended[k])} incubation (or rank on the corrected "
            f"{fmt_conc(r.corrected_affinity_M)}) before the {next_stage(r.stage)} decision"
        )
        records.append({
            "compound_id": r.compound_id, "rule": "affinity-underestimate", "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": CAUTION_AFFINITY,
            "data": _data(
                likely=False, evidence="residence-time", potency_id=r.potency_id,
                kinetic_measurement_id=r.kinetic_measurement_id, assay=r.assay, readout=r.readout,
                value_M=r.value_M, incubation_s=t[i], residence_time_s=rt[i], residence_time_is_lower_bound=bool(lower_bound[k]),
                fold_shift=f, fold_shift_ci95=[lo, hi] if math.isfinite(lo) or math.isfinite(hi) else None,
                corrected_affinity_M=r.corrected_affinity_M, min_incubation_s=min_inc[k],
                rule_of_thumb_incubation_s=thumb[k], recommended_incubation_s=recommended[k],
                simulated_as=r.simulated_as, approximation=r.note or None,
            ),
        })
    return _frame(records)


# ----------------------------------------------------------------------------- affinity-underestimate (likely)
def ki_shift_outcome(ratio, *, ki_shift_threshold=6.0, no_shift_ratio=1.5) -> np.ndarray:
    """``'shift'`` above the threshold, ``'no-shift'`` below ``no_shift_ratio``, else ``'inconclusive'``."""
    r = np.asarray(ratio, dtype=float)
    thr = np.asarray(ki_shift_threshold, dtype=float)
    none = np.asarray(no_shift_ratio, dtype=float)
    return np.where(r > thr, "shift", np.where(r < none, "no-shift", "inconclusive")).astype(object)


def check_ki_shift(
    pairs: pd.DataFrame,
    *,
    ki_shift_threshold=6.0,
    no_shift_ratio=1.5,
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

    Fires when ``ratio > ki_shift_threshold`` (common practice: ~6 singles out
    slow dissociators).  Evidence level 2 from ``fold_high`` up, else 1; capped
    at moderate before candidate.  Where the long potency is known, the message
    gives the residence-time interval consistent with the shift and a kon in
    ``[kon_low, kon_high]`` (:func:`~tracker.kinetics.assay.residence_time_bounds`).
    """
    n = len(pairs)
    if n == 0:
        return _empty()
    ratio = _num(pairs, "ratio")
    thr = _col(ki_shift_threshold, n)
    fires = np.isfinite(ratio) & (ratio > thr)
    if not fires.any():
        return _empty()
    idx = np.nonzero(fires)[0]
    sel = pairs.iloc[idx]
    f_high = _col(fold_high, n)[idx]
    level = np.where(ratio[idx] >= f_high, 2, 1)
    severity = severity_from(level, sel["stage"].to_numpy(), likely=True)
    t_s = _num(sel, "incubation_short_s")
    t_l = _num(sel, "incubation_long_s")
    v_l = _num(sel, "value_long_M")
    k_lo, k_hi = _col(kon_low, n)[idx], _col(kon_high, n)[idx]
    rt_lo = np.full(idx.size, np.nan)
    rt_hi = np.full(idx.size, np.nan)
    alone = np.zeros(idx.size, bool)
    ok = np.isfinite(t_s) & np.isfinite(t_l) & (t_l > t_s) & (t_s > 0) & np.isfinite(v_l) & (v_l > 0)
    for lo_k, hi_k in set(zip(k_lo[ok], k_hi[ok])):  # one vectorised call per kon range
        m = ok & (k_lo == lo_k) & (k_hi == hi_k)
        b = residence_time_bounds(ratio[idx][m], t_s[m], t_l[m], v_l[m], kon_range=(lo_k, hi_k),
                                  ratio_tolerance=float(np.mean(_col(no_shift_ratio, n)[idx][m])))
        rt_lo[m] = np.where(b.consistent, b.rt_low, b.rt_from_ratio_low)
        rt_hi[m] = np.where(b.consistent, b.rt_high, b.rt_from_ratio_high)
        alone[m] = ~b.consistent
    r_lo = _num(sel, "ratio_low")
    r_hi = _num(sel, "ratio_high")
    records = []
    names = ["compound_id", "stage", "assay", "source", "potency_ids", "time_course_id", "kinetic_measurement_id"]
    for k, r in enumerate(_rows(sel, names)):
        when = ""
        if np.isfinite(t_s[k]) and np.isfinite(t_l[k]):
            when = f" after {fmt_time(t_s[k])} than after {fmt_time(t_l[k])}"
        rt_text = ""
        if np.isfinite(rt_lo[k]):
            span = f"{fmt_time(rt_lo[k])} to {fmt_time(rt_hi[k])}" if np.isfinite(rt_hi[k]) else f"≥ {fmt_time(rt_lo[k])}"
            if alone[k]:
                rt_text = (f"; residence time {span} from the shift alone (no kon in {_fmt.sig(k_lo[k])}–{_fmt.rate2(k_hi[k])} fits "
                           "this potency too: kon may be unusual or the long read not at equilibrium)")
            else:
                rt_text = f"; consistent with residence time {span} (kon {_fmt.sig(k_lo[k])}–{_fmt.rate2(k_hi[k])})"
        eq = f"; rank on the {fmt_time(t_l[k])} value ({fmt_conc(v_l[k])}) or tighter" if np.isfinite(v_l[k]) and np.isfinite(t_l[k]) else ""
        msg = (
            f"likely underestimated: {r.assay} reads {fmt_fold(ratio[idx][k])} weaker{when}"
            f"{_fmt_ci(r_lo[k], r_hi[k], fmt_fold)}, above the {thr[idx][k]:g}× Ki-shift threshold for slow "
            f"dissociation; residence time not measured{rt_text}{eq}"
        )
        prompt = f"Measure residence time before the {next_stage(r.stage)} decision; until then do not rank on short-incubation potency"
        records.append({
            "compound_id": r.compound_id, "rule": "affinity-underestimate", "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": CAUTION_AFFINITY,
            "data": _data(
                likely=True, evidence="ki-shift", source=r.source or "potency", assay=r.assay,
                ki_shift_ratio=ratio[idx][k], ki_shift_ratio_ci95=[r_lo[k], r_hi[k]] if np.isfinite(r_lo[k]) else None,
                ki_shift_threshold=thr[idx][k], incubation_short_s=t_s[k], incubation_long_s=t_l[k], value_long_M=v_l[k],
                residence_time_low_s=rt_lo[k], residence_time_high_s=rt_hi[k] if np.isfinite(rt_hi[k]) else None,
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


def check_assay_floor(rows: pd.DataFrame, *, floor_factor=2.0) -> pd.DataFrame:
    """``affinity-underestimate`` ("likely") for a potency sitting at its series' assay floor.

    ``rows``: one row per potency value with ``compound_id``, ``stage``,
    ``potency_id``, ``assay``, ``readout``, ``value_M``, ``incubation_s``,
    ``format``, tracer columns, ``kon_per_M_s`` (the series' median measured
    kon, else the assumed one) and ``kon_source`` (text).

    The floor is the tightest apparent affinity an incubation can report, the
    value an infinitely slow dissociator reads: ln2/(kon t) for a one-step
    read, the Motulsky-Mahan/Cheng-Prusoff value for a described tracer
    competition (:func:`~tracker.kinetics.assay.assay_floor`); an IC50 read is
    compared with the floor times (1 + L/Kd).  Fires when the value is within
    ``floor_factor`` of the floor (design choice 2x).  Evidence level 0 (a
    heuristic); the grader drops it when a Ki-shift comparison shows no shift.
    """
    n = len(rows)
    if n == 0:
        return _empty()
    value = _num(rows, "value_M")
    t = _num(rows, "incubation_s")
    kon = _num(rows, "kon_per_M_s")
    L = _num(rows, "tracer_conc_M")
    kd_t = _num(rows, "tracer_kd_M")
    rt_t = _num(rows, "tracer_residence_time_s")
    fmt = rows["format"].astype(object).to_numpy()
    readout = rows["readout"].astype(object).to_numpy()
    factor = _col(floor_factor, n)
    ok = np.isfinite(value) & (value > 0) & np.isfinite(t) & (t > 0) & np.isfinite(kon) & (kon > 0)
    tracer_ok = np.isfinite(L) & (L > 0) & np.isfinite(kd_t) & (kd_t > 0) & np.isfinite(rt_t) & (rt_t > 0)
    comp = ok & (fmt == "competition-binding") & tracer_ok
    sat = ok & ~comp
    floor = np.full(n, np.nan)
    if sat.any():
        floor[sat] = assay_floor(kon[sat], t[sat])
    if comp.any():
        floor[comp] = assay_floor(kon[comp], t[comp], format="competition", tracer_kd=kd_t[comp],
                                  tracer_koff=1.0 / rt_t[comp], tracer_conc=L[comp])
        ic = comp & (readout == "IC50")
        floor[ic] = floor[ic] * (1.0 + L[ic] / kd_t[ic])
    fires = np.isfinite(floor) & (value <= factor * floor)
    if not fires.any():
        return _empty()
    idx = np.nonzero(fires)[0]
    sel = rows.iloc[idx]
    severity = severity_from(np.zeros(idx.size, int), sel["stage"].to_numpy(), likely=True)
    records = []
    for k, r in enumerate(_rows(sel, ["compound_id", "stage", "assay", "readout", "kon_source", "potency_id"])):
        i = idx[k]
        how = "tracer competition" if comp[i] else "ln2/(kon·t)"
        msg = (
            f"likely underestimated: {r.assay} {r.readout} {fmt_conc(value[i])} after {fmt_time(t[i])} sits at "
            f"{fmt_fold(value[i] / floor[i])} the assay floor {fmt_conc(floor[i])} ({how}, kon {_fmt.rate2(kon[i])}, "
            f"{r.kon_source}): a slow dissociator cannot read tighter at this incubation, so the true affinity may be "
            "much tighter; residence time not measured"
        )
        prompt = (
            f"Re-test {r.assay} at a longer incubation (a Ki-shift check) or measure residence time before the "
            f"{next_stage(r.stage)} decision"
        )
        records.append({
            "compound_id": r.compound_id, "rule": "affinity-underestimate", "severity": severity[k],
            "message": msg, "prompt": prompt, "caution": CAUTION_AFFINITY,
            "data": _data(
                likely=True, evidence="assay-floor", potency_id=r.potency_id, assay=r.assay,
                readout=r.readout, value_M=value[i], incubation_s=t[i], assay_floor_M=floor[i],
                floor_ratio=value[i] / floor[i], floor_factor=factor[i], kon_per_M_s=kon[i], kon_source=r.kon_source,
            ),
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


_CHECKED_METRICS = ("onset_s", "offset_s", "duration_above_threshold_s", "peak_occupancy", "trough_occupancy")


def _metrics(kon, koff, route, cmax, tmax, hl, thr, tau, wanted=_CHECKED_METRICS) -> dict[str, np.ndarray]:
    """engagement_metrics over rows, called once per group (with and without a dosing interval); only ``wanted`` computed."""
    n = kon.size
    out = {k: np.full(n, np.nan) for k in _CHECKED_METRICS}
    has_tau = np.isfinite(tau)
    for grp in (has_tau, ~has_tau):
        if not grp.any():
            continue
        m = engagement_metrics(kon[grp], koff[grp], route[grp], cmax[grp], np.where(route[grp] == "oral", tmax[grp], np.nan),
                               hl[grp], thr[grp], tau[grp] if has_tau[grp].all() else None, metrics=wanted)
        for k in out:
            out[k][grp] = getattr(m, k)
    return out


def check_duration_mismatch(frame: pd.DataFrame, *, default_engagement_threshold=0.5) -> pd.DataFrame:
    """``duration-mismatch``: simulated engagement against the program's intended profile.

    ``frame``: one row per compound with ``compound_id``, ``stage``,
    ``intended_profile``, the program limits ``engagement_threshold``,
    ``onset_max_s``, ``duration_min_s``, ``offset_max_s``,
    ``dosing_interval_s`` (NaN = not set), the kinetics ``kon_per_M_s``,
    ``koff_per_s``, ``koff_low_per_s``, ``koff_high_per_s`` and ``kd_source``
    (text), and the PK ``route``, ``free_cmax_M``, ``tmax_s``,
    ``half_life_s``, ``species``, ``pk_id``, ``kinetic_measurement_id``.

    Engagement d(theta)/dt = kon C (1 - theta) - koff theta under one dose
    (:func:`~tracker.kinetics.engagement.engagement_metrics`, one vectorised
    call per group).  Limits: onset <= ``onset_max``, time above threshold >=
    ``duration_min``, last time above threshold <= ``offset_max``; with a
    dosing interval, the steady-state trough must stay above the threshold when
    no ``duration_min`` shorter than the interval allows a gap.  A compound
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
    has_limits = np.isfinite(onset_max) | np.isfinite(dur_min) | np.isfinite(off_max) | np.isfinite(tau)
    thr = np.where(np.isfinite(thr_prog), thr_prog, _col(default_engagement_threshold, n))
    has_kin = np.isfinite(koff) & (koff > 0)
    has_aff = np.isfinite(kon) & (kon > 0)
    oral_ok = (route == "oral") & np.isfinite(tmax) & (tmax > 0)
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
        met = _metrics(kon[ci], koff[ci], route[ci], cmax[ci], tmax[ci], hl[ci], thr[ci], tau[ci])
        fails = _limit_failures(met, thr[ci], onset_max[ci], dur_min[ci], off_max[ci], tau[ci])
        if fails:
            _intervals(fails, frame, ci, kon, route, cmax, tmax, hl, thr, tau)
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
            caution = CAUTION_OFFSET if f["limit"] == "offset_max" else CAUTION_NOT_DOSING_ADVICE
            records.append({
                "compound_id": r.compound_id, "rule": "duration-mismatch", "severity": sev_by_stage[i],
                "message": f"{f['text']}{f.get('ci_text', '')} for the {profile[i]} profile; simulated with {context}",
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
                ),
            })
    return _frame(records)


_METRIC_OF_LIMIT = {"engagement_threshold": "peak_occupancy", "onset_max": "onset_s", "duration_min": "duration_above_threshold_s",
                    "offset_max": "offset_s", "dosing_interval": "trough_occupancy"}


def _limit_failures(met, thr, onset_max, dur_min, off_max, tau) -> list[dict]:
    """One dict per failed limit: row (within the simulated rows), limit, value, limit_value, excess, text."""
    onset, offset, dur = met["onset_s"], met["offset_s"], met["duration_above_threshold_s"]
    peak, trough = met["peak_occupancy"], met["trough_occupancy"]
    never = ~np.isfinite(onset)
    out = []
    pct = _fmt.pct
    for j in range(onset.size):
        if never[j]:
            out.append({"row": j, "limit": "engagement_threshold", "value": peak[j], "limit_value": thr[j],
                        "excess": peak[j] - thr[j],
                        "text": f"engagement never reaches the {pct(thr[j])} threshold (peak occupancy {pct(peak[j])})"})
            continue
        if np.isfinite(onset_max[j]) and onset[j] > onset_max[j]:
            out.append({"row": j, "limit": "onset_max", "value": onset[j], "limit_value": onset_max[j],
                        "excess": onset[j] - onset_max[j],
                        "text": f"onset {fmt_time(onset[j])} exceeds the {fmt_time(onset_max[j])} limit by {fmt_time(onset[j] - onset_max[j])} ({fmt_fold(onset[j] / onset_max[j])})"})
        if np.isfinite(dur_min[j]) and dur[j] < dur_min[j]:
            out.append({"row": j, "limit": "duration_min", "value": dur[j], "limit_value": dur_min[j],
                        "excess": dur[j] - dur_min[j],
                        "text": f"time above threshold {fmt_time(dur[j])} falls {fmt_time(dur_min[j] - dur[j])} short of the {fmt_time(dur_min[j])} minimum ({fmt_fold(dur[j] / dur_min[j])}) after one dose"})
        if np.isfinite(off_max[j]) and offset[j] > off_max[j]:
            out.append({"row": j, "limit": "offset_max", "value": offset[j], "limit_value": off_max[j],
                        "excess": offset[j] - off_max[j],
                        "text": f"offset {fmt_time(offset[j])} after dosing exceeds the {fmt_time(off_max[j])} limit by {fmt_time(offset[j] - off_max[j])} ({fmt_fold(offset[j] / off_max[j])})"})
        gap_allowed = np.isfinite(dur_min[j]) and dur_min[j] < tau[j]
        if np.isfinite(tau[j]) and np.isfinite(trough[j]) and trough[j] < thr[j] and not gap_allowed:
            out.append({"row": j, "limit": "dosing_interval", "value": trough[j], "limit_value": thr[j],
                        "excess": trough[j] - thr[j],
                        "text": f"at steady state on a {fmt_time(tau[j])} dosing interval occupancy falls to {pct(trough[j])}, below the {pct(thr[j])} threshold"})
    return out


def _intervals(fails, frame, ci, kon, route, cmax, tmax, hl, thr, tau) -> None:
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
                   wanted)
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
