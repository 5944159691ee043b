"""Read-only views: one SQL query each, returned as a pandas DataFrame.

The grader, the dashboard and the CLI read through these; none loads ORM
object graphs or queries per row.  Every function takes ``bind``: an
:class:`~sqlalchemy.Engine`, a :class:`~sqlalchemy.Connection` or a
:class:`~sqlalchemy.orm.Session` (use the latter two to read inside a
transaction you already hold).

Column conventions follow the schema: SI floats named with their unit
(``value_M``, ``koff_per_s``), the original text beside them (``value_text``).
Float columns are ``float64`` (NaN for missing), timestamps are UTC-aware
``datetime64``, ``measured_on`` is ``datetime64`` (date at midnight).  The
audit ``at`` stays the ISO text the chain hashes.
"""

from __future__ import annotations

import json
from collections.abc import Iterable

import pandas as pd
from sqlalchemy import Connection, Date, DateTime, Engine, Float, Select, func, literal, select, union_all
from sqlalchemy.orm import Session

from ..errors import NotFoundError
from .models import (
    AuditEvent,
    Compound,
    Decision,
    KineticMeasurement,
    PKProfile,
    Potency,
    Program,
    RuleConfig,
    Signature,
    StageHistory,
    TimeCourse,
    User,
    UTCDateTime,
)

Bind = Engine | Connection | Session


def _frame(bind: Bind, stmt: Select) -> pd.DataFrame:
    if isinstance(bind, Engine):
        with bind.connect() as conn:
            result = conn.execute(stmt)
            rows, keys = result.all(), list(result.keys())
    else:
        result2 = bind.execute(stmt)
        rows, keys = result2.all(), list(result2.keys())
    df = pd.DataFrame.from_records(rows, columns=keys)
    for col in stmt.selected_columns:
        name = col.key if hasattr(col, "key") else col.name
        if name not in df.columns:
            continue
        t = col.type
        if isinstance(t, Float):
            df[name] = pd.to_numeric(df[name], errors="coerce").astype("float64")
        elif isinstance(t, (UTCDateTime, DateTime)):
            df[name] = pd.to_datetime(df[name], utc=True)
        elif isinstance(t, Date):
            df[name] = pd.to_datetime(df[name])
    return df


def _compound_filter(stmt: Select, compounds: Iterable[str] | None, program: str | None) -> Select:
    if compounds is not None:
        stmt = stmt.where(Compound.name.in_(list(compounds)))
    if program is not None:
        stmt = stmt.where(Program.name == program)
    return stmt


# ------------------------------------------------------------------ entities
def programs(bind: Bind) -> pd.DataFrame:
    """Every program with its profile thresholds."""
    return _frame(bind, select(*Program.__table__.columns).order_by(Program.id))


def compounds(bind: Bind, program: str | None = None, stage: str | None = None) -> pd.DataFrame:
    """Compounds with their program's name (column ``program``)."""
    stmt = select(*Compound.__table__.columns, Program.name.label("program")).join(Program, Program.id == Compound.program_id)
    stmt = _compound_filter(stmt, None, program)
    if stage is not None:
        stmt = stmt.where(Compound.stage == stage)
    return _frame(bind, stmt.order_by(Compound.id))


def users(bind: Bind) -> pd.DataFrame:
    """Every user, without the password hash (it never leaves the users service)."""
    return _frame(bind, select(*(c for c in User.__table__.columns if c.name != "password_hash")).order_by(User.id))


def rule_configs(bind: Bind, program: str | None = None) -> pd.DataFrame:
    """Stored rule configurations (``program`` NaN/None = global)."""
    stmt = select(*RuleConfig.__table__.columns, Program.name.label("program")).outerjoin(Program, Program.id == RuleConfig.program_id)
    if program is not None:
        stmt = stmt.where(Program.name == program)
    return _frame(bind, stmt.order_by(RuleConfig.id))


# ------------------------------------------------------------------ measurements
def _measurement(model, bind: Bind, compounds: Iterable[str] | None, program: str | None) -> pd.DataFrame:
    stmt = (
        select(*model.__table__.columns, Compound.name.label("compound"), Program.name.label("program"))
        .join(Compound, Compound.id == model.compound_id)
        .join(Program, Program.id == Compound.program_id)
    )
    return _frame(bind, _compound_filter(stmt, compounds, program).order_by(model.id))


def potency(bind: Bind, compounds: Iterable[str] | None = None, program: str | None = None) -> pd.DataFrame:
    """Potency rows with compound and program names."""
    return _measurement(Potency, bind, compounds, program)


def pk(bind: Bind, compounds: Iterable[str] | None = None, program: str | None = None) -> pd.DataFrame:
    """PK profiles with compound and program names."""
    return _measurement(PKProfile, bind, compounds, program)


def kinetics(bind: Bind, latest: bool = False, compounds: Iterable[str] | None = None, program: str | None = None) -> pd.DataFrame:
    """Kinetic measurements, with ``residence_time_s = 1/koff`` and ``kd_from_rates_M = koff/kon`` added.

    ``latest=True`` keeps one row per compound among those not superseded: the
    most recent ``measured_on`` (undated rows count as oldest), ties broken by
    the newest row.  Without it every row is listed, superseded ones included
    (``superseded_by_id`` says by which).
    """
    cols = list(KineticMeasurement.__table__.columns)
    base = (
        select(*cols, Compound.name.label("compound"), Program.name.label("program"))
        .join(Compound, Compound.id == KineticMeasurement.compound_id)
        .join(Program, Program.id == Compound.program_id)
    )
    base = _compound_filter(base, compounds, program)
    if latest:
        base = base.where(KineticMeasurement.superseded_by_id.is_(None))
        rank = func.row_number().over(
            partition_by=KineticMeasurement.compound_id,
            order_by=(KineticMeasurement.measured_on.desc().nulls_last(), KineticMeasurement.id.desc()),
        ).label("_rank")
        sub = base.add_columns(rank).subquery()
        stmt = select(*[c for c in sub.c if c.key != "_rank"]).where(sub.c._rank == 1).order_by(sub.c.compound_id)
    else:
        stmt = base.order_by(KineticMeasurement.id)
    df = _frame(bind, stmt)
    df["residence_time_s"] = 1.0 / df["koff_per_s"].astype("float64")
    df["kd_from_rates_M"] = df["koff_per_s"].astype("float64") / df["kon_per_M_s"].astype("float64")
    return df


def time_courses(bind: Bind, compounds: Iterable[str] | None = None) -> pd.DataFrame:
    """Stored raw time courses without their data (id, compound, method, meta_json, created_at)."""
    stmt = select(
        TimeCourse.id, TimeCourse.compound_id, Compound.name.label("compound"), TimeCourse.method,
        TimeCourse.meta_json, TimeCourse.content_hash, TimeCourse.created_at,
    ).join(Compound, Compound.id == TimeCourse.compound_id)
    if compounds is not None:
        stmt = stmt.where(Compound.name.in_(list(compounds)))
    return _frame(bind, stmt.order_by(TimeCourse.id))


def time_course(bind: Bind, time_course_id: int) -> pd.DataFrame:
    """The data of one time course (columns time_s, signal, concentration_M, curve).

    ``df.attrs`` holds ``id``, ``compound``, ``method`` and ``meta`` (a dict).
    """
    stmt = select(TimeCourse.id, TimeCourse.method, TimeCourse.data_json, TimeCourse.meta_json, Compound.name.label("compound")).join(
        Compound, Compound.id == TimeCourse.compound_id).where(TimeCourse.id == time_course_id)
    rows = _frame(bind, stmt)
    if rows.empty:
        raise NotFoundError(f"no time course with id {time_course_id}")
    r = rows.iloc[0]
    df = pd.DataFrame(json.loads(r["data_json"]))
    df.attrs.update({"id": int(r["id"]), "compound": r["compound"], "method": r["method"], "meta": json.loads(r["meta_json"]) if r["meta_json"] else {}})
    return df


# ------------------------------------------------------------------ decisions and audit
def stage_history(bind: Bind, compounds: Iterable[str] | None = None) -> pd.DataFrame:
    stmt = select(*StageHistory.__table__.columns, Compound.name.label("compound")).join(Compound, Compound.id == StageHistory.compound_id)
    if compounds is not None:
        stmt = stmt.where(Compound.name.in_(list(compounds)))
    return _frame(bind, stmt.order_by(StageHistory.id))


def decisions(bind: Bind, compounds: Iterable[str] | None = None) -> pd.DataFrame:
    stmt = select(*Decision.__table__.columns, Compound.name.label("compound")).join(Compound, Compound.id == Decision.compound_id)
    if compounds is not None:
        stmt = stmt.where(Compound.name.in_(list(compounds)))
    return _frame(bind, stmt.order_by(Decision.id))


def signatures(bind: Bind, compounds: Iterable[str] | None = None) -> pd.DataFrame:
    """Electronic signatures with their decision: ``id, decision_id, signer, printed_name, role, meaning, at,
    compound, from_stage, to_stage, outcome``, oldest first."""
    stmt = (select(*Signature.__table__.columns, Compound.name.label("compound"), Decision.from_stage, Decision.to_stage,
                   Decision.outcome)
            .join(Decision, Decision.id == Signature.decision_id).join(Compound, Compound.id == Decision.compound_id))
    if compounds is not None:
        stmt = stmt.where(Compound.name.in_(list(compounds)))
    return _frame(bind, stmt.order_by(Signature.id))


def audit_events(
    bind: Bind,
    *,
    actor: str | None = None,
    action: str | None = None,
    entity_type: str | None = None,
    entity_id: str | int | None = None,
    since: str | None = None,
    until: str | None = None,
    limit: int | None = None,
    newest_first: bool = False,
) -> pd.DataFrame:
    """Audit events filtered by equality on actor/action/entity and an ``at`` range (ISO text, UTC)."""
    stmt = select(*AuditEvent.__table__.columns)
    for col, value in ((AuditEvent.actor, actor), (AuditEvent.action, action), (AuditEvent.entity_type, entity_type)):
        if value is not None:
            stmt = stmt.where(col == value)
    if entity_id is not None:
        stmt = stmt.where(AuditEvent.entity_id == str(entity_id))
    if since is not None:
        stmt = stmt.where(AuditEvent.at >= since)
    if until is not None:
        stmt = stmt.where(AuditEvent.at <= until)
    stmt = stmt.order_by(AuditEvent.id.desc() if newest_first else AuditEvent.id)
    if limit is not None:
        stmt = stmt.limit(limit)
    return _frame(bind, stmt)


COUNTED = {
    "programs": Program,
    "compounds": Compound,
    "potency": Potency,
    "kinetic_measurements": KineticMeasurement,
    "time_courses": TimeCourse,
    "pk_profiles": PKProfile,
    "users": User,
    "rule_configs": RuleConfig,
    "decisions": Decision,
    "stage_history": StageHistory,
    "audit_events": AuditEvent,
}


def table_counts(bind: Bind) -> pd.DataFrame:
    """Rows per table plus ``saved_fits`` (fits saved with their raw time course, every method), in one query."""
    parts = [select(literal(name).label("table"), func.count().label("rows")).select_from(model) for name, model in COUNTED.items()]
    parts.append(
        select(literal("saved_fits").label("table"), func.count().label("rows")).select_from(TimeCourse).where(TimeCourse.meta_json.is_not(None))
    )
    stmt = union_all(*parts)
    if isinstance(bind, Engine):
        with bind.connect() as conn:
            rows = conn.execute(stmt).all()
    else:
        rows = bind.execute(stmt).all()
    df = pd.DataFrame.from_records(rows, columns=["table", "rows"])
    df["rows"] = df["rows"].astype("int64")
    order = {name: i for i, name in enumerate(list(COUNTED) + ["saved_fits"])}
    return df.sort_values("table", key=lambda s: s.map(order)).reset_index(drop=True)


def counts(bind: Bind) -> dict[str, int]:
    """:func:`table_counts` as a plain dict."""
    df = table_counts(bind)
    return dict(zip(df["table"], df["rows"].astype(int)))


__all__ = [
    "programs",
    "compounds",
    "users",
    "rule_configs",
    "potency",
    "kinetics",
    "pk",
    "time_courses",
    "time_course",
    "stage_history",
    "decisions",
    "signatures",
    "audit_events",
    "table_counts",
    "counts",
]
