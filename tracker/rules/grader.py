"""The grader: every rule over a whole portfolio in one vectorised pass.

:func:`grade_frames` takes plain DataFrames (a :class:`Portfolio`, as the
queries in :mod:`tracker.db.queries` return them) and a rule configuration per
program, and returns a :class:`GradeResult`: one findings frame and one row per
compound with its grade.  It knows no database; the service
:mod:`tracker.services.grading` loads the frames and the dashboard's what-if
page can pass edited copies.

Steps (each a vectorised DataFrame operation or one call of a ``check_*``):

1. pick each compound's kinetic measurement: the latest dated non-qualitative
   row (a saved Ki-shift or insurmountability fit carries no residence time);
2. predict the fold shift of every potency value of a compound with a measured
   residence time (one simulation call per assay format) and run
   :func:`~tracker.rules.checks.check_affinity_underestimate`;
3. for compounds without a residence time, gather the qualitative evidence:
   Ki-shift pairs (the same compound, assay, readout and format at two
   incubation times; geometric means per time, shortest against longest) and
   saved Ki-shift fits, insurmountable curves (potency rows and saved fits),
   and potencies at the series' assay floor (kon = the series' median
   measured kon, else the configured assumed kon);
4. precedence, "direct evidence beats heuristics": a measured residence time
   silences every inferred finding (step 3 runs only without one), and a Ki-shift
   comparison showing no shift (ratio < ``no_shift_ratio``) silences the
   assay-floor heuristic for that compound;
5. ``residence-time-unmeasured`` with the slow-binding evidence of step 3;
6. ``duration-mismatch``: kon from the measurement (or koff/KD), else KD from
   the compound's longest-incubation KD/Ki/Kb corrected to equilibrium; the
   preferred PK row (human first, then oral, then newest); the program's
   dosing interval, else the PK study's;
7. grade = the worst finding's severity; ``clear`` when there is none.

Grades: ``high`` > ``moderate`` > ``low`` > ``clear`` (``clear`` = no finding).
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .. import fmt
from ..domain import STAGES
from .checks import (
    FINDING_COLUMNS,
    check_affinity_underestimate,
    check_assay_floor,
    check_conflicting_kinetics,
    check_duration_mismatch,
    check_insurmountability,
    check_ki_shift,
    check_residence_time_unmeasured,
    check_tight_binding,
    fmt_fold,
    ki_shift_outcome,
    assay_suggestions,
)
from .config import DEFAULTS, FIELD_NAMES, RULES, SEVERITY_RANK, RuleConfig, version_label
from .evidence import QUALITATIVE_METHODS, READING_COLUMNS, select_kinetics, predict_readings, summarise
from .engagement import dosing_interval

__all__ = ["Portfolio", "GradeResult", "grade_frames", "parse_fit", "assay_key", "QUALITATIVE_METHODS", "GRADE_ORDER"]

GRADE_ORDER = ("high", "moderate", "low", "clear")
_RULE_ORDER = {r: i for i, r in enumerate(RULES)}
_AFFINITY_READOUTS = ("KD", "Ki", "Kb")
_SPECIES_PREFERENCE = {"human": 0}


def _empty(columns) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


@dataclass
class Portfolio:
    """The frames the grader reads (columns as returned by :mod:`tracker.db.queries`).

    ``compounds``: id, name, program, series, stage.  ``programs``: name,
    intended_profile, engagement_threshold, onset_max_s, duration_min_s,
    offset_max_s, dosing_interval_s.  ``potency``, ``kinetics``, ``pk``:
    the measurement views (``compound_id`` keyed).  ``time_courses``: id,
    compound_id, method, meta_json (optional; saved fits may carry their
    result there).
    """

    compounds: pd.DataFrame
    programs: pd.DataFrame
    potency: pd.DataFrame
    kinetics: pd.DataFrame
    pk: pd.DataFrame
    time_courses: pd.DataFrame | None = None

    def measurement_ids(self, compound_id: int) -> dict[str, list[int]]:
        """Ids of every measurement of one compound (for evidence snapshots)."""
        out = {}
        for key, df in (("potency_ids", self.potency), ("kinetic_measurement_ids", self.kinetics), ("pk_ids", self.pk),
                        ("time_course_ids", self.time_courses)):
            if df is None or df.empty:
                out[key] = []
                continue
            out[key] = sorted(int(i) for i in df.loc[df["compound_id"] == compound_id, "id"])
        return out


@dataclass
class GradeResult:
    """Output of :func:`grade_frames`.

    ``compounds``: one row per compound (compound_id, compound, program,
    series, stage, grade, n_findings, top_rule, top_severity, top_message,
    residence_time_s, kinetic_measurement_id, best_potency_M,
    best_potency_readout, best_potency_assay, best_potency_incubation_s,
    max_fold_shift, corrected_affinity_M, ruleset_version).  ``findings``:
    :data:`~tracker.rules.checks.FINDING_COLUMNS`, sorted worst first within
    each compound.  ``potency``: every potency row with its predicted
    ``fold_shift`` and ``corrected_affinity_M`` (NaN without a residence time).
    """

    compounds: pd.DataFrame
    findings: pd.DataFrame
    potency: pd.DataFrame = field(default_factory=pd.DataFrame)
    ruleset_versions: dict[str, str] = field(default_factory=dict)
    #: the evidence model's kinetics per compound and every kinetic run (tracker.rules.evidence.select_kinetics)
    kinetics: pd.DataFrame = field(default_factory=pd.DataFrame)
    kinetic_runs: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: the inputs of the duration check, one row per compound (engagement tiles use the same)
    duration: pd.DataFrame = field(default_factory=pd.DataFrame)

    def findings_of(self, compound_id: int) -> list[dict[str, Any]]:
        f = self.findings[self.findings["compound_id"] == compound_id]
        return [_finding_dict(r) for r in f.itertuples(index=False)]

    def to_records(self) -> list[dict[str, Any]]:
        """The JSON contract: ``[{compound, program, series, stage, grade, findings: [...]}]``."""
        by_compound: dict[Any, list[dict]] = {}
        for r in self.findings.itertuples(index=False):
            by_compound.setdefault(r.compound_id, []).append(_finding_dict(r))
        out = []
        for r in self.compounds.itertuples(index=False):
            out.append({
                "compound": r.compound,
                "program": r.program,
                "series": None if r.series is None or (isinstance(r.series, float) and math.isnan(r.series)) else r.series,
                "stage": r.stage,
                "grade": r.grade,
                "findings": by_compound.get(r.compound_id, []),
            })
        return out


def _finding_dict(r) -> dict[str, Any]:
    d = {"rule": r.rule, "severity": r.severity, "message": r.message, "prompt": r.prompt}
    if isinstance(r.caution, str) and r.caution:
        d["caution"] = r.caution
    for k, v in (r.data or {}).items():
        if k in _RENAMED and _RENAMED[k] not in d:
            d[_RENAMED[k]] = v  # the contract's name, as in every other JSON output
        if k not in d:
            d[k] = v  # deprecated spelling kept for one release (README, "JSON keys")
    return d


#: finding keys whose first spelling broke the JSON naming (``/M/s`` is ``per_M_per_s`` everywhere else)
_RENAMED = {"kon_per_M_s": "kon_per_M_per_s"}


# ----------------------------------------------------------------------------- fits stored as JSON
def parse_fit(text: str | None) -> dict[str, Any] | None:
    """The qualitative content of a stored fit (``FitResult.to_dict`` or ``to_json_keys`` JSON).

    Returns ``{method, ratio, ratio_low, ratio_high, incubation_short_s,
    incubation_long_s, value_long_M, fraction, fraction_low, fraction_high,
    rt_lower_bound}`` (missing values NaN) or ``None`` for empty/unreadable text.
    A time course's ``meta_json`` may nest the fit under ``"fit"``.
    """
    if not text or not isinstance(text, str):
        return None
    try:
        d = json.loads(text)
    except ValueError:
        return None
    if not isinstance(d, dict):
        return None
    if isinstance(d.get("fit"), dict):
        d = d["fit"]
    method = d.get("method")
    est = d.get("estimates") if isinstance(d.get("estimates"), dict) else {}
    ci = d.get("ci95") if isinstance(d.get("ci95"), dict) else {}
    extras = d.get("extras") if isinstance(d.get("extras"), dict) else {}

    def num(v):
        try:
            return float(v) if v is not None else math.nan
        except (TypeError, ValueError):
            return math.nan

    def pick(name, flat_key):
        v = est.get(name, d.get(flat_key))
        return num(v)

    def interval(name, flat_key):
        pair = ci.get(name, d.get(flat_key))
        if isinstance(pair, (list, tuple)) and len(pair) == 2:
            return num(pair[0]), (math.inf if pair[1] is None else num(pair[1]))
        return math.nan, math.nan

    ratio = pick("ki_shift_ratio", "ki_shift_ratio")
    r_lo, r_hi = interval("ki_shift_ratio", "ki_shift_ratio_ci95")
    frac = pick("max_response_fraction", "max_response_fraction")
    f_lo, f_hi = interval("max_response_fraction", "max_response_fraction_ci95")
    t_s = num(extras.get("incubation_short_s", d.get("incubation_short_s")))
    t_l = num(extras.get("incubation_long_s", d.get("incubation_long_s")))
    v_long = num(est.get("ki", d.get("ki_M")))
    labels = extras.get("labels")
    if not math.isfinite(v_long) and isinstance(labels, list) and labels:
        v_long = num(est.get(f"ic50[{labels[-1]}]"))
    lower = bool(extras.get("rt_is_lower_bound", d.get("rt_is_lower_bound", False)))
    return {"method": method, "ratio": ratio, "ratio_low": r_lo, "ratio_high": r_hi, "incubation_short_s": t_s,
            "incubation_long_s": t_l, "value_long_M": v_long, "fraction": frac, "fraction_low": f_lo,
            "fraction_high": f_hi, "rt_lower_bound": lower}


def _parse_column(df: pd.DataFrame, column: str) -> pd.DataFrame:
    """:func:`parse_fit` of every non-empty cell of ``column`` (one row per parsed cell, index kept)."""
    if df is None or df.empty or column not in df.columns:
        return pd.DataFrame()
    texts = df[column]
    texts = texts[texts.notna()]
    parsed = {i: parse_fit(t) for i, t in texts.items()}
    parsed = {i: p for i, p in parsed.items() if p is not None}
    if not parsed:
        return pd.DataFrame()
    return pd.DataFrame.from_dict(parsed, orient="index")


# ----------------------------------------------------------------------------- configuration per row
def _config_table(programs: list[str], configs: Mapping[str, RuleConfig] | None) -> pd.DataFrame:
    configs = configs or {}
    rows = {p: (configs.get(p) or DEFAULTS).to_dict() for p in programs}
    return pd.DataFrame.from_dict(rows, orient="index", columns=list(FIELD_NAMES)) if rows else pd.DataFrame(columns=list(FIELD_NAMES))


def _cfg(frame: pd.DataFrame, table: pd.DataFrame, name: str) -> np.ndarray:
    if frame.empty:
        return np.empty(0)
    return frame["program"].map(table[name]).to_numpy(dtype=float)


# ----------------------------------------------------------------------------- the pass
def _select_kinetics(kin: pd.DataFrame, conflict_fold=3.0):
    """(the evidence model's selection, the qualitative fit rows)."""
    if kin is None or kin.empty:
        sel = select_kinetics(None)
        return sel, pd.DataFrame()
    kin = kin.copy()
    parsed = _parse_column(kin, "fit_json")
    methods = parsed["method"].reindex(kin.index) if "method" in parsed else pd.Series(None, index=kin.index, dtype=object)
    lower = parsed["rt_lower_bound"].reindex(kin.index) if "rt_lower_bound" in parsed else None
    sel = select_kinetics(kin, fit_methods=methods, rt_lower_bound=lower, conflict_fold=conflict_fold)
    qual_mask = sel.qualitative_mask
    qual = parsed.loc[parsed.index.intersection(kin.index[qual_mask])].copy() if qual_mask.any() else pd.DataFrame()
    if not qual.empty:
        qual["compound_id"] = kin.loc[qual.index, "compound_id"]
        qual["kinetic_measurement_id"] = kin.loc[qual.index, "id"]
        qual["time_course_id"] = kin.loc[qual.index, "time_course_id"] if "time_course_id" in kin.columns else np.nan
    return sel, qual


_TIME_TOKEN = re.compile(r"(?<![A-Za-z0-9.])\d+(?:\.\d+)?\s*(?:s|sec|secs|m|min|mins|minutes?|h|hr|hrs|hours?|d|days?)(?![A-Za-z0-9])",
                         re.IGNORECASE)


def assay_key(name: str) -> str:
    """An assay's name without incubation-time tokens: ``'HF bind 16h'`` -> ``'hf bind'``.

    Potency values pair into a Ki-shift comparison when compound, assay key,
    readout and format agree, so one assay recorded under the same name at two
    times, or under names that differ only by the time (``... 15m`` /
    ``... 3h``), both count.
    """
    text = _TIME_TOKEN.sub(" ", str(name))
    return " ".join(text.lower().replace("_", " ").split())


def _potency_pairs(pot: pd.DataFrame) -> pd.DataFrame:
    """Ki-shift comparisons from potency rows: same compound/assay key/readout/format at >= 2 incubation times.

    Replicates at one time enter as their geometric mean; the shortest time is compared with the longest.
    """
    cols = ["compound_id", "assay", "readout", "format", "ratio", "incubation_short_s", "incubation_long_s", "value_long_M", "potency_ids"]
    if pot.empty:
        return _empty(cols)
    p = pot[["compound_id", "assay", "readout", "format", "incubation_s", "value_M", "potency_id"]].copy()
    names = p["assay"].to_numpy(dtype=object)
    keys_of = {a: assay_key(a) for a in pd.unique(names)}
    p["_key"] = [keys_of[a] for a in names]
    p["_g"] = p.groupby(["compound_id", "_key", "readout", "format"], sort=False, dropna=False).ngroup().to_numpy()
    n_times = p.groupby("_g")["incubation_s"].transform("nunique")
    p = p[(n_times >= 2).to_numpy()]
    if p.empty:
        return _empty(cols)
    p["_logv"] = np.log(p["value_M"].to_numpy(dtype=float))
    per = p.groupby(["_g", "incubation_s"], sort=True).agg(_logv=("_logv", "mean"), assay=("assay", "first"),
                                                            compound_id=("compound_id", "first"), readout=("readout", "first"),
                                                            format=("format", "first"))
    first = per.groupby(level=0).head(1)  # sorted by time within a group: the shortest
    last = per.groupby(level=0).tail(1)  # the longest
    g = first.index.get_level_values(0).to_numpy()
    t_s = first.index.get_level_values(1).to_numpy(dtype=float)
    t_l = last.index.get_level_values(1).to_numpy(dtype=float)
    out = pd.DataFrame({"compound_id": first["compound_id"].to_numpy(), "readout": first["readout"].to_numpy(),
                        "format": first["format"].to_numpy()})
    a_s, a_l = first["assay"].to_numpy(dtype=object), last["assay"].to_numpy(dtype=object)
    out["assay"] = [a if a == b else f"{a} vs {b}" for a, b in zip(a_s, a_l)]
    out["ratio"] = np.exp(first["_logv"].to_numpy() - last["_logv"].to_numpy())
    out["incubation_short_s"] = t_s
    out["incubation_long_s"] = t_l
    out["value_long_M"] = np.exp(last["_logv"].to_numpy())
    # ids of the rows at the two times compared, per group (one sort and one split, no Python groupby)
    pos = pd.Series(np.arange(g.size), index=g)
    rg = p["_g"].to_numpy()
    t = p["incubation_s"].to_numpy(dtype=float)
    j = pos.reindex(rg).to_numpy()
    used = (t == t_s[j]) | (t == t_l[j])
    order = np.lexsort((p["potency_id"].to_numpy()[used], j[used]))
    ids_sorted = p["potency_id"].to_numpy()[used][order].astype(int)
    bounds = np.searchsorted(j[used][order], np.arange(1, g.size))
    out["potency_ids"] = [a.tolist() for a in np.split(ids_sorted, bounds)]
    return out[cols]


def _series_kon(comp: pd.DataFrame, kin: pd.DataFrame) -> pd.DataFrame:
    """Median measured kon per (program, series) and the number of compounds it comes from."""
    k = kin[["compound_id", "kon_per_M_s"]].merge(comp[["compound_id", "program", "series"]], on="compound_id")
    k = k[np.isfinite(k["kon_per_M_s"].astype(float)) & k["series"].notna()]
    if k.empty:
        return pd.DataFrame(columns=["program", "series", "series_kon", "series_kon_n"])
    g = k.groupby(["program", "series"])["kon_per_M_s"]
    return pd.DataFrame({"series_kon": g.median(), "series_kon_n": g.size()}).reset_index()


def _pick_pk(pk: pd.DataFrame) -> pd.DataFrame:
    cols = ["compound_id", "pk_id", "species", "route", "half_life_s", "free_cmax_M", "tmax_s", "pk_dosing_interval_s"]
    if pk is None or pk.empty:
        return _empty(cols)
    p = pk.copy()
    p["_sp"] = p["species"].astype(str).str.lower().map(_SPECIES_PREFERENCE).fillna(1)
    p["_rt"] = (p["route"] != "oral").astype(int)
    p = p.sort_values(["compound_id", "_sp", "_rt", "id"], ascending=[True, True, True, False], kind="mergesort")
    p = p.drop_duplicates("compound_id", keep="first")
    return p.rename(columns={"id": "pk_id", "dosing_interval_s": "pk_dosing_interval_s"})[cols].reset_index(drop=True)


def _compound_frame(compounds: pd.DataFrame) -> pd.DataFrame:
    c = compounds.rename(columns={"id": "compound_id", "name": "compound"})
    cols = ["compound_id", "compound", "program", "series", "stage"]
    for col in cols:
        if col not in c.columns:
            c[col] = None
    return c[cols].reset_index(drop=True)


def _saved_fits(time_courses: pd.DataFrame | None, qual_kin: pd.DataFrame, has_rt: set, comp: pd.DataFrame) -> pd.DataFrame:
    """Saved Ki-shift and insurmountability fits (time courses and qualitative kinetics rows) of compounds without RT."""
    parts = [qual_kin] if not qual_kin.empty else []
    if time_courses is not None and not time_courses.empty and "meta_json" in time_courses.columns:
        parsed = _parse_column(time_courses, "meta_json")
        if not parsed.empty:
            parsed = parsed[parsed["method"].isin(QUALITATIVE_METHODS)].copy()
            parsed["compound_id"] = time_courses.loc[parsed.index, "compound_id"]
            parsed["time_course_id"] = time_courses.loc[parsed.index, "id"]
            # a fit saved both as a measurement and inside its time course counts once
            if not qual_kin.empty and "time_course_id" in qual_kin.columns:
                parsed = parsed[~parsed["time_course_id"].isin(qual_kin["time_course_id"].dropna())]
            parts.append(parsed)
    if not parts:
        return pd.DataFrame(columns=["method", "compound_id"])
    fits = pd.concat(parts, ignore_index=True)
    return fits[~fits["compound_id"].isin(has_rt) & fits["compound_id"].isin(comp["compound_id"])]


def _ki_shift_findings(no_rt: pd.DataFrame, fits: pd.DataFrame, comp: pd.DataFrame, table: pd.DataFrame) -> tuple[list, set]:
    """Ki-shift findings (potency pairs and saved fits) and the compounds whose comparisons show no shift."""
    pairs = _potency_pairs(no_rt)
    pairs["source"] = "potency"
    if not fits.empty:
        ks = fits[(fits["method"] == "ki-shift") & np.isfinite(fits["ratio"].astype(float))].copy()
        if not ks.empty:
            ks["assay"] = "a saved Ki-shift fit"
            ks["source"] = "fit"
            # a potency pair at the same two incubations as a saved fit of the compound is the same experiment:
            # one finding, from the fit (it carries the interval)
            same = pairs.merge(ks[["compound_id", "incubation_short_s", "incubation_long_s"]].drop_duplicates(),
                               on=["compound_id", "incubation_short_s", "incubation_long_s"], how="left", indicator=True)
            pairs = pairs[(same["_merge"] == "left_only").to_numpy()]
            pairs = pd.concat([pairs, ks], ignore_index=True)
    if pairs.empty:
        return [], set()
    pairs = pairs.merge(comp[["compound_id", "program", "stage"]], on="compound_id", how="inner")
    thr, none = _cfg(pairs, table, "ki_shift_threshold"), _cfg(pairs, table, "no_shift_ratio")
    found = check_ki_shift(pairs, ki_shift_threshold=thr, no_shift_ratio=none, fold_moderate=_cfg(pairs, table, "fold_moderate"),
                           fold_high=_cfg(pairs, table, "fold_high"),
                           kon_low=_cfg(pairs, table, "kon_low_per_M_s"), kon_high=_cfg(pairs, table, "kon_high_per_M_s"))
    outcome = ki_shift_outcome(pairs["ratio"].astype(float), ki_shift_threshold=thr, no_shift_ratio=none,
                               short_incubation=pairs["incubation_short_s"].astype(float),
                               long_incubation=pairs["incubation_long_s"].astype(float))
    shifted = set(pairs.loc[outcome == "shift", "compound_id"])
    return [found], set(pairs.loc[outcome == "no-shift", "compound_id"]) - shifted


def _insurmountability_findings(no_rt: pd.DataFrame, fits: pd.DataFrame, comp: pd.DataFrame, table: pd.DataFrame) -> pd.DataFrame:
    """Insurmountable curves: potency rows with a max_response_fraction and saved insurmountability fits."""
    ins = no_rt[np.isfinite(no_rt["max_response_fraction"].astype(float))].copy()
    ins["source"] = "potency"
    if not fits.empty:
        fi = fits[(fits["method"] == "insurmountability") & np.isfinite(fits["fraction"].astype(float))].copy()
        if not fi.empty:
            fi = fi.rename(columns={"fraction": "max_response_fraction", "fraction_low": "max_response_fraction_low",
                                    "fraction_high": "max_response_fraction_high"})
            fi["assay"] = "a saved insurmountability fit"
            fi["source"] = "fit"
            ins = pd.concat([ins, fi.merge(comp[["compound_id", "program", "stage"]], on="compound_id", how="inner")], ignore_index=True)
    if ins.empty:
        return _empty(FINDING_COLUMNS)
    return check_insurmountability(ins, insurmountable_fraction=_cfg(ins, table, "insurmountable_fraction"),
                                   insurmountable_strong_fraction=_cfg(ins, table, "insurmountable_strong_fraction"))


def _floor_findings(rows: pd.DataFrame, comp: pd.DataFrame, kin: pd.DataFrame, table: pd.DataFrame) -> pd.DataFrame:
    """Potencies at the assay floor; kon = the series' median measured kon, else the configured assumed kon."""
    if rows.empty:
        return _empty(FINDING_COLUMNS)
    fr = rows.merge(_series_kon(comp, kin), on=["program", "series"], how="left")
    measured = np.isfinite(fr["series_kon"].astype(float)).to_numpy()
    fr["kon_per_M_s"] = np.where(measured, fr["series_kon"].astype(float), _cfg(fr, table, "assumed_kon_per_M_s"))
    n_k = fr["series_kon_n"].fillna(0).astype(int).to_numpy()
    fr["kon_source"] = [f"median of {k} measured in the series" if m else "assumed; no kon measured in the series"
                        for m, k in zip(measured, n_k)]
    return check_assay_floor(fr, floor_factor=_cfg(fr, table, "floor_factor"), below_floor_factor=_cfg(fr, table, "below_floor_factor"))


def grade_frames(portfolio: Portfolio, configs: Mapping[str, RuleConfig] | None = None,
                 versions: Mapping[str, str] | None = None) -> GradeResult:
    """Grade every compound of ``portfolio`` (see the module docstring for the steps).

    ``configs`` maps program name -> :class:`~tracker.rules.config.RuleConfig`
    (default :data:`~tracker.rules.config.DEFAULTS`); ``versions`` maps program
    name -> rule-set version label.
    """
    comp = _compound_frame(portfolio.compounds)
    programs = sorted(set(comp["program"].dropna()))
    table = _config_table(programs, configs)
    versions = {p: (versions or {}).get(p, version_label()) for p in programs}

    conflict_fold = comp.drop_duplicates("compound_id").set_index("compound_id")["program"].map(table["conflict_fold"]) \
        if len(comp) and len(table) else 3.0
    selection, qual_kin = _select_kinetics(portfolio.kinetics, conflict_fold)
    kin = selection.chosen
    has_rt = set(kin["compound_id"].tolist())

    # ---- potency rows with compound context and (where measured) kinetics
    pot = portfolio.potency.copy() if portfolio.potency is not None else pd.DataFrame()
    if pot.empty:
        pot = pd.DataFrame(columns=["id", "compound_id", "assay", "readout", "value_M", "incubation_s", "format", "tracer_conc_M",
                                    "tracer_kd_M", "tracer_residence_time_s", "max_response_fraction"])
    for c in _OPTIONAL_POTENCY:
        if c not in pot.columns:
            pot[c] = np.nan
    pot = pot.drop(columns=[c for c in ("program", "compound", "stage", "series") if c in pot.columns])
    pot = pot.merge(comp[["compound_id", "program", "series", "stage"]], on="compound_id", how="inner")
    pot = pot.rename(columns={"id": "potency_id"}).reset_index(drop=True)
    keys_of = {a: assay_key(a) for a in pd.unique(pot["assay"].to_numpy(dtype=object))}
    pot["reading_group"] = [keys_of[a] for a in pot["assay"].to_numpy(dtype=object)]
    with_rt = pot["compound_id"].isin(has_rt).to_numpy()
    rows = pot[with_rt].merge(kin, on="compound_id", how="left")
    pred = predict_readings(rows, tolerance=_cfg(rows, table, "fold_tolerance")) if len(rows) else pd.DataFrame(columns=READING_COLUMNS)
    rows = pd.concat([rows.reset_index(drop=True), pred.reset_index(drop=True)], axis=1)
    found = [check_affinity_underestimate(
        rows,
        incubation_multiple=_cfg(rows, table, "incubation_multiple"),
        fold_tolerance=_cfg(rows, table, "fold_tolerance"),
        fold_moderate=_cfg(rows, table, "fold_moderate"),
        fold_high=_cfg(rows, table, "fold_high"),
        max_incubation_s=_cfg(rows, table, "max_incubation_s"),
    )] if len(rows) else []
    stages = comp.set_index("compound_id")["stage"]
    found.append(check_conflicting_kinetics(kin, selection.runs, stages, conflict_fold=conflict_fold))
    found.append(check_tight_binding(pot, tight_binding_factor=_cfg(pot, table, "tight_binding_factor")))

    # ---- qualitative evidence, compounds without a residence time only
    no_rt = pot[~with_rt]
    fits = _saved_fits(portfolio.time_courses, qual_kin, has_rt, comp)
    likely, no_shift = _ki_shift_findings(no_rt, fits, comp, table)
    likely.append(_insurmountability_findings(no_rt, fits, comp, table))
    floor = _floor_findings(no_rt, comp, kin, table)
    below = floor[floor["rule"] == "potency-below-floor"] if not floor.empty else floor
    # a Ki-shift pair that could have shown a shift and did not silences the floor heuristic (direct evidence wins)
    likely.append(floor[(floor["rule"] != "potency-below-floor") & ~floor["compound_id"].isin(no_shift)] if not floor.empty else floor)
    likely = [f for f in likely if not f.empty]
    found += likely
    found.append(below)

    # ---- residence-time-unmeasured (only lead-optimization and later can fire: text for those only)
    rt_frame = comp[["compound_id", "stage"]].copy()
    rt_frame["has_kinetics"] = rt_frame["compound_id"].isin(has_rt)
    late = rt_frame["stage"].isin(STAGES[STAGES.index("lead-optimization"):]) & ~rt_frame["has_kinetics"]
    need = set(rt_frame.loc[late, "compound_id"])
    ev_rows = pd.concat(likely, ignore_index=True) if likely else None
    if ev_rows is not None:
        ev_rows = ev_rows[ev_rows["compound_id"].isin(need)]
    evidence = _evidence_text(ev_rows)
    assays = assay_suggestions(pot, need)
    rt_frame["slow_evidence"] = rt_frame["compound_id"].map(evidence)
    rt_frame["suggested_assay"] = rt_frame["compound_id"].map(assays)
    found.append(check_residence_time_unmeasured(rt_frame))

    # ---- duration-mismatch
    dm = _duration_frame(comp, portfolio.programs, _duration_kinetics(kin, selection.runs, portfolio.programs, comp), portfolio.pk, rows)
    dm["default_engagement_threshold"] = _cfg(dm, table, "default_engagement_threshold")
    dm["bound_target_degradation_factor"] = _cfg(dm, table, "bound_target_degradation_factor")
    found.append(check_duration_mismatch(dm, default_engagement_threshold=dm["default_engagement_threshold"].to_numpy(float),
                                         bound_target_degradation_factor=dm["bound_target_degradation_factor"].to_numpy(float)))

    # ---- combine
    found = [f for f in found if f is not None and not f.empty]
    findings = pd.concat(found, ignore_index=True) if found else _empty(FINDING_COLUMNS)
    if not findings.empty:
        findings["_rank"] = findings["severity"].map(SEVERITY_RANK)
        findings["_rule"] = findings["rule"].map(_RULE_ORDER)
        findings = findings.sort_values(["compound_id", "_rank", "_rule"], ascending=[True, False, True], kind="mergesort")
        findings = findings.drop(columns=["_rank", "_rule"]).reset_index(drop=True)
    summary = _summary(comp, findings, kin, pot, rows, versions)
    potency_out = pot.merge(rows[["potency_id"] + READING_COLUMNS], on="potency_id", how="left") if len(rows) else \
        pot.assign(**{c: np.nan for c in READING_COLUMNS})
    return GradeResult(summary, findings, potency_out, versions, kinetics=kin, kinetic_runs=selection.runs, duration=dm)


_OPTIONAL_POTENCY = ("tracer_conc_M", "tracer_kd_M", "tracer_residence_time_s", "max_response_fraction", "preincubation_s",
                     "max_incubation_s", "target_conc_M")


def _duration_kinetics(kin: pd.DataFrame, runs: pd.DataFrame, programs: pd.DataFrame | None, comp: pd.DataFrame) -> pd.DataFrame:
    """The kinetics the duration check uses: the selection, except that for conflicting runs the riskier end is
    taken per profile: the fastest run (shortest residence time) when the program sets a minimum duration or a
    dosing interval and no offset limit (too short an action is the risk), else the slowest (as for potency)."""
    if kin.empty or not kin["conflict"].fillna(False).astype(bool).any() or programs is None or programs.empty:
        return kin
    pr = programs.rename(columns={"name": "program"}).set_index("program")
    prog = kin["compound_id"].map(comp.drop_duplicates("compound_id").set_index("compound_id")["program"])
    g = lambda c: pd.to_numeric(prog.map(pr[c]) if c in pr.columns else pd.Series(np.nan, index=kin.index), errors="coerce")  # noqa: E731
    wants_duration = (g("duration_min_s").notna() | g("dosing_interval_s").notna()) & g("offset_max_s").isna()
    swap = kin["conflict"].fillna(False).astype(bool) & wants_duration
    if not swap.any():
        return kin
    fastest = runs.sort_values("koff_per_s").drop_duplicates("compound_id", keep="last").set_index("compound_id")
    out = kin.copy()
    ids = out.loc[swap, "compound_id"]
    out.loc[swap, "koff_per_s"] = ids.map(fastest["koff_per_s"]).to_numpy(float)
    kon = ids.map(fastest["kon_per_M_s"]).astype(float)
    out.loc[swap, "kon_per_M_s"] = np.where(np.isfinite(kon), kon, out.loc[swap, "kon_per_M_s"].astype(float))
    out.loc[swap, "kinetic_measurement_id"] = ids.map(fastest["kinetic_measurement_id"]).to_numpy()
    return out


def _evidence_text(likely: pd.DataFrame | None) -> dict:
    """compound_id -> short text naming its slow-binding evidence, grouped by kind."""
    if likely is None or likely.empty:
        return {}
    out: dict[Any, dict[str, list[str]]] = {}
    for cid, data in zip(likely["compound_id"], likely["data"]):
        kind = data.get("evidence")
        if kind == "ki-shift":
            head, item = "Ki shift", f"{fmt_fold(data.get('ki_shift_ratio'))} in {data.get('assay')}"
        elif kind == "insurmountable":
            head, item = "insurmountable", f"maximum {fmt.pct(data.get('max_response_fraction'))} in {data.get('assay')}"
        else:
            head, item = "potency at the assay floor", str(data.get("assay"))
        items = out.setdefault(cid, {}).setdefault(head, [])
        if item not in items:
            items.append(item)
    return {k: "; ".join(f"{h} ({', '.join(v)})" for h, v in kinds.items()) for k, kinds in out.items()}


def _duration_frame(comp, programs, kin, pk, rows) -> pd.DataFrame:
    prog_cols = ["intended_profile", "engagement_threshold", "onset_max_s", "duration_min_s", "offset_max_s", "dosing_interval_s",
                 "target_half_life_s"]
    pr = programs.rename(columns={"name": "program"}) if programs is not None else pd.DataFrame(columns=["program"])
    for c in prog_cols:
        if c not in pr.columns:
            pr[c] = np.nan
    f = comp.merge(pr[["program"] + prog_cols], on="program", how="left")
    f = f.merge(kin, on="compound_id", how="left")
    f = f.merge(_pick_pk(pk), on="compound_id", how="left")
    f["kd_source"] = np.where(np.isfinite(f["kon_per_M_s"].astype(float)), "measured", None)
    # affinity from potency when kon and KD were not measured: longest-incubation KD/Ki/Kb, corrected to equilibrium
    need = f["kon_per_M_s"].isna() & f["koff_per_s"].notna()
    if need.any() and len(rows):
        cand = rows[np.isfinite(rows["corrected_affinity_M"].astype(float))].copy()
        # KD, Ki or Kb first (equilibrium constants), else an IC50/EC50 taken as KD; the longest incubation of those
        cand["_pref"] = (~cand["readout"].isin(_AFFINITY_READOUTS)).astype(int)
        cand = cand.sort_values(["compound_id", "_pref", "incubation_s", "potency_id"], ascending=[True, False, True, True],
                                kind="mergesort").drop_duplicates("compound_id", keep="last")
        kd_est = cand.set_index("compound_id")["corrected_affinity_M"]
        label = pd.Series([f"{ro} from {a} corrected to equilibrium" + ("" if ro in _AFFINITY_READOUTS else ", taken as KD")
                           for ro, a in zip(cand["readout"], cand["assay"])], index=cand["compound_id"].to_numpy(), dtype=object)
        ids = f.loc[need, "compound_id"]
        kd = ids.map(kd_est).astype(float)
        f.loc[need, "kon_per_M_s"] = f.loc[need, "koff_per_s"].astype(float) / kd
        f.loc[need, "kd_source"] = ids.map(label)
    f["dosing_interval_s"] = dosing_interval(f["dosing_interval_s"].astype(float), f["pk_dosing_interval_s"].astype(float))
    return f


def _summary(comp, findings, kin, pot, rows, versions) -> pd.DataFrame:
    s = comp.copy()
    if findings.empty:
        s["grade"] = "clear"
        s["n_findings"] = 0
        s["top_rule"] = None
        s["top_severity"] = None
        s["top_message"] = None
    else:
        top = findings.drop_duplicates("compound_id", keep="first").set_index("compound_id")
        counts = findings.groupby("compound_id").size()
        s["top_rule"] = s["compound_id"].map(top["rule"])
        s["top_severity"] = s["compound_id"].map(top["severity"])
        s["top_message"] = s["compound_id"].map(top["message"])
        s["grade"] = s["top_severity"].fillna("clear")
        s["n_findings"] = s["compound_id"].map(counts).fillna(0).astype(int)
    ev = summarise(s["compound_id"], kin, rows).set_index("compound_id")
    for c in ev.columns:
        s[c] = s["compound_id"].map(ev[c])
    if len(pot):
        best = pot.sort_values(["compound_id", "value_M"], kind="mergesort").drop_duplicates("compound_id").set_index("compound_id")
        s["best_potency_M"] = s["compound_id"].map(best["value_M"])
        s["best_potency_readout"] = s["compound_id"].map(best["readout"])
        s["best_potency_assay"] = s["compound_id"].map(best["assay"])
        s["best_potency_incubation_s"] = s["compound_id"].map(best["incubation_s"])
    else:
        for c in ("best_potency_M", "best_potency_readout", "best_potency_assay", "best_potency_incubation_s"):
            s[c] = np.nan
    s["ruleset_version"] = s["program"].map(versions)
    return s
