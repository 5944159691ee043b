"""What the dashboard reads, and how it is cached.

Two layers:

* ``read_*`` functions: plain functions of an engine (or a session) that run
  one SQL query each, or call a service, and return DataFrames.  No
  Streamlit; the review pack and the tests use them directly.
* cached wrappers without the prefix: ``st.cache_data(ttl=..., max_entries=...)``
  keyed on plain arguments only: the database URL, the database *version* and
  the filters.  The engine comes from :func:`get_engine`
  (``st.cache_resource``).

The database version is ``(max audit event id, number of audit events)``:
every write appends an audit event, so any write makes every cached result
stale at once, while an unchanged database is never re-read or re-graded.
Grading the whole portfolio therefore happens once per write, not once per
rerun.

Units: SI floats as stored (M, s, 1/s, 1/(M*s)); pages convert to nM/h when
they display.  Filtering pushes the program, stage, series and name search
into the SQL ``WHERE``; grade filters, sorting and paging then work on the
cached, already-filtered frame with vectorised pandas operations (the grade
is computed, not stored, so it cannot be a SQL predicate).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import streamlit as st
from sqlalchemy import Engine, and_, func, literal, or_, select

from ..db import queries
from ..db.models import AuditEvent, Compound, PKProfile, Potency, Program, TimeCourse, User
from ..db.session import database_url, make_engine
from ..domain import STAGES

TTL_S = 600  # cached query results live at most 10 min even without writes (other processes may write)
MAX_ENTRIES = 64


# ------------------------------------------------------------------ engine and version
@st.cache_resource(show_spinner=False)
def get_engine(url: str) -> Engine:
    """One engine per database URL for the whole server process."""
    return make_engine(url)


def current_url() -> str:
    return database_url()


def read_version(engine: Engine) -> tuple[int, int]:
    """``(max audit id, audit event count)``: changes with every write (one cheap query)."""
    with engine.connect() as conn:
        row = conn.execute(select(func.coalesce(func.max(AuditEvent.id), 0), func.count()).select_from(AuditEvent)).one()
    return int(row[0]), int(row[1])


def version(url: str) -> tuple[int, int]:
    """The current database version (never cached: it is the cache key of everything else)."""
    return read_version(get_engine(url))


def clear_caches() -> None:
    """Forget every cached query (after a write made from this session)."""
    st.cache_data.clear()


# ------------------------------------------------------------------ small entity reads
def read_programs(engine: Engine) -> pd.DataFrame:
    return queries.programs(engine)


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def programs(url: str, ver: tuple[int, int]) -> pd.DataFrame:
    return read_programs(get_engine(url))


def read_users(engine: Engine) -> pd.DataFrame:
    return queries.users(engine)


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def users(url: str, ver: tuple[int, int]) -> pd.DataFrame:
    return read_users(get_engine(url))


def read_compound_names(engine: Engine, program: str | None = None) -> list[str]:
    stmt = select(Compound.name).join(Program, Program.id == Compound.program_id).order_by(Compound.name)
    if program:
        stmt = stmt.where(Program.name == program)
    with engine.connect() as conn:
        return list(conn.execute(stmt).scalars())


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def compound_names(url: str, ver: tuple[int, int], program: str | None = None) -> list[str]:
    return read_compound_names(get_engine(url), program)


def read_series(engine: Engine, program: str | None = None) -> list[str]:
    stmt = select(Compound.series).distinct().join(Program, Program.id == Compound.program_id).where(Compound.series.is_not(None))
    if program:
        stmt = stmt.where(Program.name == program)
    with engine.connect() as conn:
        return sorted(conn.execute(stmt).scalars())


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def series_names(url: str, ver: tuple[int, int], program: str | None = None) -> list[str]:
    return read_series(get_engine(url), program)


# ------------------------------------------------------------------ portfolio summary (one SQL query)
@dataclass(frozen=True)
class SummaryFilter:
    """Filters pushed into the SQL ``WHERE`` of :func:`read_compound_summary`."""

    program: str | None = None
    stages: tuple[str, ...] = ()
    series: tuple[str, ...] = ()
    search: str = ""
    compounds: tuple[str, ...] = ()


def _summary_select(flt: SummaryFilter):
    best = (
        select(
            Potency.compound_id,
            Potency.value_M.label("best_potency_M"),
            Potency.readout.label("best_readout"),
            Potency.assay.label("best_assay"),
            Potency.incubation_s.label("best_incubation_s"),
            Potency.format.label("best_format"),
            Potency.tracer_conc_M.label("best_tracer_conc_M"),
            Potency.tracer_kd_M.label("best_tracer_kd_M"),
            Potency.tracer_residence_time_s.label("best_tracer_rt_s"),
            func.row_number().over(partition_by=Potency.compound_id, order_by=(Potency.value_M.asc(), Potency.id.asc())).label("rk"),
            func.count().over(partition_by=Potency.compound_id).label("n_potency"),
        )
    ).subquery("best")
    pk = (
        select(
            PKProfile.compound_id,
            PKProfile.species.label("pk_species"),
            func.row_number().over(partition_by=PKProfile.compound_id, order_by=PKProfile.id.desc()).label("rk"),
            func.count().over(partition_by=PKProfile.compound_id).label("n_pk"),
        )
    ).subquery("pkp")
    stmt = (
        select(
            Compound.id.label("compound_id"),
            Compound.name.label("compound"),
            Program.name.label("program"),
            Compound.series,
            Compound.stage,
            Compound.smiles,
            best.c.best_potency_M, best.c.best_readout, best.c.best_assay, best.c.best_incubation_s, best.c.best_format,
            best.c.best_tracer_conc_M, best.c.best_tracer_kd_M, best.c.best_tracer_rt_s,
            func.coalesce(best.c.n_potency, 0).label("n_potency"),
            pk.c.pk_species,
            func.coalesce(pk.c.n_pk, 0).label("n_pk"),
        )
        .join(Program, Program.id == Compound.program_id)
        .outerjoin(best, and_(best.c.compound_id == Compound.id, best.c.rk == 1))
        .outerjoin(pk, and_(pk.c.compound_id == Compound.id, pk.c.rk == 1))
    )
    if flt.program:
        stmt = stmt.where(Program.name == flt.program)
    if flt.stages:
        stmt = stmt.where(Compound.stage.in_(list(flt.stages)))
    if flt.series:
        stmt = stmt.where(Compound.series.in_(list(flt.series)))
    if flt.compounds:
        stmt = stmt.where(Compound.name.in_(list(flt.compounds)))
    if flt.search.strip():
        pattern = f"%{flt.search.strip().lower()}%"
        stmt = stmt.where(or_(func.lower(Compound.name).like(pattern), func.lower(func.coalesce(Compound.series, literal(""))).like(pattern)))
    return stmt.order_by(Compound.id)


def read_compound_summary(engine: Engine, flt: SummaryFilter = SummaryFilter()) -> pd.DataFrame:
    """One row per compound: identity, stage, best potency with its incubation, PK count (one SQL query).

    Kinetic numbers (residence time, predicted folds, the worst reading) are not
    computed here: they come from the grader's evidence model, merged in by
    :func:`merge_portfolio`.
    """
    stmt = _summary_select(flt)
    with engine.connect() as conn:
        result = conn.execute(stmt)
        df = pd.DataFrame.from_records(result.all(), columns=list(result.keys()))
    floats = ["best_potency_M", "best_incubation_s", "best_tracer_conc_M", "best_tracer_kd_M", "best_tracer_rt_s"]
    for c in floats:
        df[c] = pd.to_numeric(df[c], errors="coerce").astype("float64")
    for c in ("n_potency", "n_pk"):
        df[c] = df[c].fillna(0).astype("int64")
    return df


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def compound_summary(url: str, ver: tuple[int, int], flt: SummaryFilter) -> pd.DataFrame:
    return read_compound_summary(get_engine(url), flt)


# ------------------------------------------------------------------ grading (helper services)
def read_grading(engine: Engine, program: str | None = None):
    """The grader's full result (:class:`tracker.rules.grader.GradeResult`): findings and the evidence model's numbers."""
    from ..services.grading import grade_result

    return grade_result(engine, program)[0]


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner="Grading the portfolio ...")
def grading(url: str, ver: tuple[int, int], program: str | None = None):
    """Graded portfolio, computed once per database version and program filter (every page reads this one)."""
    return read_grading(get_engine(url), program)


def read_grades(engine: Engine, program: str | None = None) -> list[dict[str, Any]]:
    """The grading service's list of ``{compound, program, series, stage, grade, findings}``."""
    return read_grading(engine, program).to_records()


def grades(url: str, ver: tuple[int, int], program: str | None = None) -> list[dict[str, Any]]:
    """The JSON contract of the cached grading (:func:`grading`)."""
    return grading(url, ver, program).to_records()


#: The evidence model's per-compound numbers the pages show (tracker.rules.evidence.summarise).
EVIDENCE_COLUMNS = ["residence_time_s", "residence_time_low_s", "residence_time_high_s", "n_kinetic_runs", "kinetics_conflict",
                    "worst_fold_shift", "worst_fold_shift_low", "worst_fold_shift_high", "worst_reading", "worst_potency_id"]


def evidence_table(result) -> pd.DataFrame:
    """``compound`` plus :data:`EVIDENCE_COLUMNS` from a grading result."""
    c = result.compounds
    cols = ["compound"] + [k for k in EVIDENCE_COLUMNS if k in c.columns]
    return c[cols].copy() if len(c) else pd.DataFrame(columns=["compound"] + EVIDENCE_COLUMNS)


def grade_table(graded: list[dict[str, Any]]) -> pd.DataFrame:
    """One row per compound: ``compound, grade, n_findings, top_rule, top_severity, top_message, top_prompt``.

    The top finding is the most severe (ties: the grader's order).
    """
    from .theme import SEVERITY_ORDER

    rows = []
    for g in graded:
        findings = list(g.get("findings") or [])
        top = min(findings, key=lambda f: SEVERITY_ORDER.get(f.get("severity"), 9)) if findings else None
        rows.append({
            "compound": g["compound"],
            "grade": g.get("grade"),
            "n_findings": len(findings),
            "top_rule": top.get("rule") if top else None,
            "top_severity": top.get("severity") if top else None,
            "top_message": top.get("message") if top else None,
            "top_prompt": top.get("prompt") if top else None,
        })
    return pd.DataFrame(rows, columns=["compound", "grade", "n_findings", "top_rule", "top_severity", "top_message", "top_prompt"])


def findings_of(graded: list[dict[str, Any]], compound: str) -> dict[str, Any] | None:
    for g in graded:
        if g["compound"] == compound:
            return g
    return None


def merge_portfolio(summary: pd.DataFrame, graded: pd.DataFrame, evidence: pd.DataFrame | None = None) -> pd.DataFrame:
    """Summary rows with their grade columns and the evidence model's numbers (compounds the grader skipped stay,
    marked ungraded)."""
    from .theme import grade_key, grade_label

    df = summary.merge(graded, on="compound", how="left")
    ev = evidence if evidence is not None else pd.DataFrame(columns=["compound"] + EVIDENCE_COLUMNS)
    df = df.merge(ev, on="compound", how="left")
    for c in EVIDENCE_COLUMNS:
        if c not in df.columns:
            df[c] = np.nan
    keys = df["grade"].map(grade_key)
    df["grade_key"] = keys
    df["grade_label"] = df["grade"].map(grade_label)
    df["grade_rank"] = keys.map({"high": 0, "moderate": 1, "low": 2, "clear": 3}).fillna(4).astype("int64")
    df["stage_rank"] = df["stage"].map({s: i for i, s in enumerate(STAGES)}).astype("int64")
    df["n_findings"] = df["n_findings"].fillna(0).astype("int64")
    return df


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def portfolio(url: str, ver: tuple[int, int], flt: SummaryFilter) -> pd.DataFrame:
    """Filtered summary merged with the (separately cached) grades of the program."""
    summary = compound_summary(url, ver, flt)
    result = grading(url, ver, flt.program)
    return merge_portfolio(summary, grade_table(result.to_records()), evidence_table(result))


# ------------------------------------------------------------------ one compound
def read_compound(engine: Engine, name: str) -> dict[str, Any]:
    """Everything the evidence page shows about one compound (frames in SI)."""
    stmt = (select(*Compound.__table__.columns, Program.name.label("program"))
            .join(Program, Program.id == Compound.program_id).where(Compound.name == name))
    with engine.connect() as conn:
        found = conn.execute(stmt).mappings().first()
    if found is None:
        from ..errors import NotFoundError

        raise NotFoundError(f"unknown compound {name!r}")
    row = dict(found)
    progs = queries.programs(engine)
    program = progs[progs["name"] == row["program"]].iloc[0].to_dict()
    return {
        "compound": row,
        "program": program,
        "potency": queries.potency(engine, compounds=[name]),
        "kinetics": queries.kinetics(engine, compounds=[name]),
        "pk": queries.pk(engine, compounds=[name]),
        "fits": read_fits(engine, name),
    }


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def compound(url: str, ver: tuple[int, int], name: str) -> dict[str, Any]:
    return read_compound(get_engine(url), name)


def read_fits(engine: Engine, name: str) -> list[dict[str, Any]]:
    """Stored fits of a compound: ``{id, method, source, data (DataFrame), fit (dict), created_at}``.

    A stored fit is a time course whose ``meta_json`` holds the fit result
    (see :mod:`tracker.services.fits`).
    """
    stmt = (
        select(TimeCourse.id, TimeCourse.method, TimeCourse.data_json, TimeCourse.meta_json, TimeCourse.created_at)
        .join(Compound, Compound.id == TimeCourse.compound_id)
        .where(Compound.name == name)
        .order_by(TimeCourse.id)
    )
    out = []
    with engine.connect() as conn:
        for r in conn.execute(stmt):
            meta = json.loads(r.meta_json) if r.meta_json else {}
            if not meta.get("fit"):
                continue
            out.append({
                "id": int(r.id),
                "method": meta.get("fit_method") or r.method,
                "source": meta.get("source") or "",
                "data": pd.DataFrame(json.loads(r.data_json)),
                "fit": meta["fit"],
            })
    return out


def read_decisions(engine: Engine, name: str) -> pd.DataFrame:
    """The compound's decisions, newest first, with a ``signatures`` column (one line per signature)."""
    from ..services.gates import signature_text

    df = queries.decisions(engine, compounds=[name]).sort_values("id", ascending=False).reset_index(drop=True)
    sigs = queries.signatures(engine, compounds=[name])
    by_decision: dict[int, list[str]] = {}
    for rec in sigs.to_dict("records"):
        by_decision.setdefault(int(rec["decision_id"]), []).append(signature_text(rec))
    df["signatures"] = [" · ".join(by_decision.get(int(i), [])) for i in df["id"]] if not df.empty else pd.Series(dtype=str)
    return df


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def decisions(url: str, ver: tuple[int, int], name: str) -> pd.DataFrame:
    return read_decisions(get_engine(url), name)


# ------------------------------------------------------------------ measurement queue and what-if inputs
def read_queue(engine: Engine, program: str | None = None) -> pd.DataFrame:
    """The ranked measurement queue of the queue service (one row per queued compound)."""
    from ..services.grading import grade_result
    from ..services.queue import rank_queue

    result, portfolio = grade_result(engine, program)
    return rank_queue(result, portfolio)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner="Ranking ...")
def queue(url: str, ver: tuple[int, int], program: str | None = None) -> pd.DataFrame:
    return read_queue(get_engine(url), program)


def read_series_frames(engine: Engine, name: str):
    """``(Portfolio, configs, versions, compound_id)`` for a compound's series: the what-if page's inputs."""
    from ..services.grading import grade_compound, load_configs

    _, _, portfolio = grade_compound(engine, name)
    program = portfolio.compounds.loc[portfolio.compounds["name"] == name, "program"].iloc[0]
    cid = int(portfolio.compounds.loc[portfolio.compounds["name"] == name, "id"].iloc[0])
    configs, versions = load_configs(engine, [program])
    return portfolio, configs, versions, cid


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def series_frames(url: str, ver: tuple[int, int], name: str):
    return read_series_frames(get_engine(url), name)


# ------------------------------------------------------------------ kinetic map
def kinetic_points_of(result) -> pd.DataFrame:
    """The evidence model's kinetics of every compound with kon and koff (combined runs), with series and stage."""
    kin = result.kinetics
    if kin is None or kin.empty:
        return pd.DataFrame(columns=["compound", "series", "stage", "kon_per_M_s", "koff_per_s", "kd_M", "n_runs", "residence_time_s"])
    kin = kin[np.isfinite(kin["kon_per_M_s"].astype(float)) & np.isfinite(kin["koff_per_s"].astype(float))]
    comp = result.compounds[["compound_id", "compound", "series", "stage"]]
    out = kin[["compound_id", "kon_per_M_s", "koff_per_s", "kd_M", "n_runs"]].merge(comp, on="compound_id", how="inner")
    out["residence_time_s"] = 1.0 / out["koff_per_s"].astype(float)
    return out.drop(columns="compound_id")


def read_kinetic_points(engine: Engine, program: str | None = None) -> pd.DataFrame:
    """:func:`kinetic_points_of` a fresh grading."""
    return kinetic_points_of(read_grading(engine, program))


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def kinetic_points(url: str, ver: tuple[int, int], program: str | None = None) -> pd.DataFrame:
    return kinetic_points_of(grading(url, ver, program))


# ------------------------------------------------------------------ audit
@dataclass(frozen=True)
class AuditFilter:
    actor: str | None = None
    action: str | None = None
    entity_type: str | None = None
    text: str = ""
    since: str | None = None  # ISO date
    until: str | None = None  # ISO date (inclusive)


def _audit_where(stmt, flt: AuditFilter):
    if flt.actor:
        stmt = stmt.where(AuditEvent.actor == flt.actor)
    if flt.action:
        stmt = stmt.where(AuditEvent.action == flt.action)
    if flt.entity_type:
        stmt = stmt.where(AuditEvent.entity_type == flt.entity_type)
    if flt.since:
        stmt = stmt.where(AuditEvent.at >= flt.since)
    if flt.until:
        stmt = stmt.where(AuditEvent.at < f"{flt.until}T99")  # ISO text: every time on that day sorts below 'T99'
    if flt.text.strip():
        pattern = f"%{flt.text.strip().lower()}%"
        stmt = stmt.where(or_(
            func.lower(func.coalesce(AuditEvent.entity_id, literal(""))).like(pattern),
            func.lower(func.coalesce(AuditEvent.reason, literal(""))).like(pattern),
            func.lower(func.coalesce(AuditEvent.after_json, literal(""))).like(pattern),
        ))
    return stmt


def read_audit(engine: Engine, flt: AuditFilter = AuditFilter(), *, limit: int = 100, offset: int = 0) -> tuple[pd.DataFrame, int]:
    """One page of audit events, newest first, and the number of events matching the filter."""
    cols = [AuditEvent.id, AuditEvent.at, AuditEvent.actor, AuditEvent.action, AuditEvent.entity_type,
            AuditEvent.entity_id, AuditEvent.reason, AuditEvent.before_json, AuditEvent.after_json, AuditEvent.hash]
    stmt = _audit_where(select(*cols), flt).order_by(AuditEvent.id.desc()).limit(limit).offset(offset)
    count = _audit_where(select(func.count()).select_from(AuditEvent), flt)
    from ..services.audit_view import describe

    with engine.connect() as conn:
        result = conn.execute(stmt)
        df = pd.DataFrame.from_records(result.all(), columns=list(result.keys()))
        total = int(conn.execute(count).scalar_one())
        df = describe(conn, df)
    return df, total


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def audit(url: str, ver: tuple[int, int], flt: AuditFilter, limit: int, offset: int) -> tuple[pd.DataFrame, int]:
    return read_audit(get_engine(url), flt, limit=limit, offset=offset)


def read_audit_choices(engine: Engine) -> dict[str, list[str]]:
    """Distinct actors, actions and entity types (for the filter widgets)."""
    out = {}
    with engine.connect() as conn:
        for key, col in (("actor", AuditEvent.actor), ("action", AuditEvent.action), ("entity_type", AuditEvent.entity_type)):
            out[key] = sorted(conn.execute(select(col).distinct()).scalars())
    return out


@st.cache_data(ttl=TTL_S, max_entries=MAX_ENTRIES, show_spinner=False)
def audit_choices(url: str, ver: tuple[int, int]) -> dict[str, list[str]]:
    return read_audit_choices(get_engine(url))


def read_user_role(engine: Engine, name: str) -> tuple[str | None, bool, int]:
    """``(role or None, active, number of users)`` for a user name."""
    with engine.connect() as conn:
        n = int(conn.execute(select(func.count()).select_from(User)).scalar_one())
        row = conn.execute(select(User.role, User.active).where(User.name == name)).first()
    if row is None:
        return None, False, n
    return row.role, bool(row.active), n


def finite(v: Any) -> float | None:
    """``v`` as a float, or ``None`` when missing or not finite."""
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


__all__ = [
    "get_engine", "current_url", "version", "read_version", "clear_caches",
    "SummaryFilter", "read_compound_summary", "compound_summary", "read_grading", "grading", "evidence_table", "EVIDENCE_COLUMNS",
    "read_grades", "grades", "grade_table", "merge_portfolio", "portfolio", "findings_of",
    "read_compound", "compound", "read_fits", "read_decisions", "decisions", "read_queue", "queue",
    "read_series_frames", "series_frames",
    "read_kinetic_points", "kinetic_points", "kinetic_points_of",
    "AuditFilter", "read_audit", "audit", "read_audit_choices", "audit_choices",
    "programs", "read_programs", "users", "read_users", "compound_names", "read_compound_names",
    "series_names", "read_series", "read_user_role", "finite",
]
