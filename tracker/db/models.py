"""SQLAlchemy 2 typed ORM models: the tracker's schema.

Conventions
-----------
* Every quantity is stored twice: an SI float whose column name carries the
  unit (``value_M``, ``incubation_s``, ``koff_per_s``, ``kon_per_M_s``) and the
  text it arrived with (``value_text = "3.2 nM"``).  Inside the tracker only
  the floats are used; the export writes the text back, so an
  import -> export -> import round trip is lossless.
* Measurements (potency, kinetics, PK, time courses) carry a ``content_hash``
  that is unique per compound, so re-importing the same rows adds nothing.
* ``decisions`` and ``audit_events`` are append-only in the database itself
  (triggers created by the migrations), not merely by convention.
* The schema changes only through Alembic revisions in ``migrations/``;
  ``tracker.db.migrate.check_models_match`` proves these models and the
  migrations agree.

Allowed values of the enumerated columns come from :mod:`tracker.domain`; the
CHECK constraints here mirror them (a migration freezes its own copy).
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import (
    Boolean,
    CheckConstraint,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

from ..domain import ACTION_STATUSES, FORMATS, GRADE_VALUES, METHODS, OUTCOMES, READOUTS, ROLES, ROUTES, SIGNATURE_MEANINGS, STAGES

NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

#: Tables whose rows may never be updated or deleted (enforced by triggers).
APPEND_ONLY_TABLES: tuple[str, ...] = ("decisions", "audit_events", "signatures")


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


class UTCDateTime(TypeDecorator):
    """A timezone-aware UTC timestamp on every backend.

    SQLite keeps no zone, so values are converted to UTC before they are
    stored and read back as UTC; PostgreSQL stores ``timestamptz``.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime: give timestamps in UTC with tzinfo")
        value = value.astimezone(dt.timezone.utc)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.timezone.utc)
        return value.astimezone(dt.timezone.utc)


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Program(Base):
    __tablename__ = "programs"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    target: Mapped[str | None] = mapped_column(String(200))
    intended_profile: Mapped[str | None] = mapped_column(String(100))
    engagement_threshold: Mapped[float | None] = mapped_column(Float)
    engagement_threshold_text: Mapped[str | None] = mapped_column(String(64))
    onset_max_s: Mapped[float | None] = mapped_column(Float)
    onset_max_text: Mapped[str | None] = mapped_column(String(64))
    duration_min_s: Mapped[float | None] = mapped_column(Float)
    duration_min_text: Mapped[str | None] = mapped_column(String(64))
    offset_max_s: Mapped[float | None] = mapped_column(Float)
    offset_max_text: Mapped[str | None] = mapped_column(String(64))
    dosing_interval_s: Mapped[float | None] = mapped_column(Float)
    dosing_interval_text: Mapped[str | None] = mapped_column(String(64))
    target_half_life_s: Mapped[float | None] = mapped_column(Float)
    target_half_life_text: Mapped[str | None] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class Compound(Base):
    __tablename__ = "compounds"
    __table_args__ = (CheckConstraint(_in("stage", STAGES), name="stage_valid"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    program_id: Mapped[int] = mapped_column(ForeignKey("programs.id"), index=True)
    series: Mapped[str | None] = mapped_column(String(200))
    stage: Mapped[str] = mapped_column(String(32))
    smiles: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class User(Base):
    __tablename__ = "users"
    __table_args__ = (CheckConstraint(_in("role", ROLES), name="role_valid"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    #: argon2id hash (PHC string, ``$argon2id$...``) of the password; never the password itself.
    #: NULL: no password set yet, so the user cannot sign in (nor sign).
    password_hash: Mapped[str | None] = mapped_column(String(255))
    #: the signer's printed name on signatures (21 CFR Part 11 §11.50(a)(1)); NULL -> ``name``
    full_name: Mapped[str | None] = mapped_column(String(200))


class LoginSession(Base):
    """A command-line sign-in (``krt login``): only the SHA-256 of its random token is stored.

    The token itself lives in the user's private session file; editing that file
    cannot forge a session, because the hash must match a row here that has
    not expired.  ``krt logout`` deletes the row.
    """

    __tablename__ = "login_sessions"

    id: Mapped[int] = mapped_column(primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    expires_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)


class RuleConfig(Base):
    __tablename__ = "rule_configs"
    __table_args__ = (UniqueConstraint("program_id", "version"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    program_id: Mapped[int | None] = mapped_column(ForeignKey("programs.id"), index=True)  # NULL = global
    version: Mapped[int] = mapped_column(Integer)
    config_json: Mapped[str] = mapped_column(Text)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(100))


class Decision(Base):
    """A gate decision on a stage transition.  Append-only (database triggers)."""

    __tablename__ = "decisions"
    __table_args__ = (
        CheckConstraint(_in("outcome", OUTCOMES), name="outcome_valid"),
        CheckConstraint(_in("to_stage", STAGES), name="to_stage_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    from_stage: Mapped[str | None] = mapped_column(String(32))
    to_stage: Mapped[str] = mapped_column(String(32))
    outcome: Mapped[str] = mapped_column(String(16))
    by_user: Mapped[str] = mapped_column(String(100))
    reason: Mapped[str | None] = mapped_column(Text)
    waivers_json: Mapped[str | None] = mapped_column(Text)
    evidence_json: Mapped[str | None] = mapped_column(Text)
    ruleset_version: Mapped[str | None] = mapped_column(String(64))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class Signature(Base):
    """An electronic signature linked to a gate decision (21 CFR Part 11 §11.50, §11.70).

    Append-only (database triggers).  Holds the signer's printed name, the UTC
    time of signing and its meaning; the password was re-entered at that
    moment (§11.200(a)(1)).  Each row is also recorded in the audit chain.
    """

    __tablename__ = "signatures"
    __table_args__ = (
        CheckConstraint(_in("meaning", SIGNATURE_MEANINGS), name="meaning_valid"),
        CheckConstraint(_in("role", ROLES), name="role_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    decision_id: Mapped[int] = mapped_column(ForeignKey("decisions.id"), index=True)
    signer: Mapped[str] = mapped_column(String(100))
    printed_name: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(16))
    meaning: Mapped[str] = mapped_column(String(16))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class StageHistory(Base):
    __tablename__ = "stage_history"
    __table_args__ = (CheckConstraint(_in("to_stage", STAGES), name="to_stage_valid"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    from_stage: Mapped[str | None] = mapped_column(String(32))
    to_stage: Mapped[str] = mapped_column(String(32))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    by_user: Mapped[str] = mapped_column(String(100))
    decision_id: Mapped[int | None] = mapped_column(ForeignKey("decisions.id"))
    note: Mapped[str | None] = mapped_column(Text)


class Potency(Base):
    __tablename__ = "potency"
    __table_args__ = (
        UniqueConstraint("compound_id", "content_hash"),
        CheckConstraint(_in("readout", READOUTS), name="readout_valid"),
        CheckConstraint(_in("format", FORMATS), name="format_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    assay: Mapped[str] = mapped_column(String(200))
    readout: Mapped[str] = mapped_column(String(16))
    value_M: Mapped[float] = mapped_column(Float)
    value_text: Mapped[str | None] = mapped_column(String(64))
    incubation_s: Mapped[float] = mapped_column(Float)
    incubation_text: Mapped[str | None] = mapped_column(String(64))
    format: Mapped[str] = mapped_column(String(32))
    tracer_conc_M: Mapped[float | None] = mapped_column(Float)
    tracer_conc_text: Mapped[str | None] = mapped_column(String(64))
    tracer_kd_M: Mapped[float | None] = mapped_column(Float)
    tracer_kd_text: Mapped[str | None] = mapped_column(String(64))
    tracer_residence_time_s: Mapped[float | None] = mapped_column(Float)
    tracer_residence_time_text: Mapped[str | None] = mapped_column(String(64))
    max_response_fraction: Mapped[float | None] = mapped_column(Float)
    max_response_fraction_text: Mapped[str | None] = mapped_column(String(64))
    preincubation_s: Mapped[float | None] = mapped_column(Float)
    preincubation_text: Mapped[str | None] = mapped_column(String(64))
    max_incubation_s: Mapped[float | None] = mapped_column(Float)
    max_incubation_text: Mapped[str | None] = mapped_column(String(64))
    target_conc_M: Mapped[float | None] = mapped_column(Float)
    target_conc_text: Mapped[str | None] = mapped_column(String(64))
    measured_on: Mapped[dt.date | None] = mapped_column(Date)
    source: Mapped[str | None] = mapped_column(String(300))
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class TimeCourse(Base):
    """A raw kinetic time course: ``data_json`` holds columns time_s, signal, concentration_M, curve."""

    __tablename__ = "time_courses"
    __table_args__ = (
        UniqueConstraint("compound_id", "content_hash"),
        CheckConstraint(_in("method", METHODS), name="method_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    method: Mapped[str] = mapped_column(String(32))
    data_json: Mapped[str] = mapped_column(Text)
    meta_json: Mapped[str | None] = mapped_column(Text)
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class KineticMeasurement(Base):
    """kon, koff (given as koff or as residence time, see ``koff_given_as``), KD and 95% bounds.

    ``superseded_by_id`` marks a value replaced by a newer one with a stated reason (see
    :func:`tracker.services.fits.save_fit`); superseded rows stay on record and are not graded.
    """

    __tablename__ = "kinetic_measurements"
    __table_args__ = (
        UniqueConstraint("compound_id", "content_hash"),
        CheckConstraint(_in("method", METHODS), name="method_valid"),
        CheckConstraint(_in("koff_given_as", ("koff", "residence_time")), name="koff_given_as_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    method: Mapped[str] = mapped_column(String(32))
    kon_per_M_s: Mapped[float | None] = mapped_column(Float)
    kon_text: Mapped[str | None] = mapped_column(String(64))
    koff_per_s: Mapped[float] = mapped_column(Float)
    koff_text: Mapped[str | None] = mapped_column(String(64))
    koff_given_as: Mapped[str] = mapped_column(String(16), default="koff")
    kd_M: Mapped[float | None] = mapped_column(Float)
    kd_text: Mapped[str | None] = mapped_column(String(64))
    kon_low_per_M_s: Mapped[float | None] = mapped_column(Float)
    kon_low_text: Mapped[str | None] = mapped_column(String(64))
    kon_high_per_M_s: Mapped[float | None] = mapped_column(Float)
    kon_high_text: Mapped[str | None] = mapped_column(String(64))
    koff_low_per_s: Mapped[float | None] = mapped_column(Float)
    koff_low_text: Mapped[str | None] = mapped_column(String(64))
    koff_high_per_s: Mapped[float | None] = mapped_column(Float)
    koff_high_text: Mapped[str | None] = mapped_column(String(64))
    fit_json: Mapped[str | None] = mapped_column(Text)
    time_course_id: Mapped[int | None] = mapped_column(ForeignKey("time_courses.id"), index=True)
    measured_on: Mapped[dt.date | None] = mapped_column(Date)
    source: Mapped[str | None] = mapped_column(String(300))
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # a newer measurement that replaced this one (the older value stays on record; the grader skips it)
    superseded_by_id: Mapped[int | None] = mapped_column(ForeignKey("kinetic_measurements.id"))
    superseded_reason: Mapped[str | None] = mapped_column(Text)
    superseded_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)


class PKProfile(Base):
    __tablename__ = "pk_profiles"
    __table_args__ = (
        UniqueConstraint("compound_id", "content_hash"),
        CheckConstraint(_in("route", ROUTES), name="route_valid"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    species: Mapped[str] = mapped_column(String(64))
    route: Mapped[str] = mapped_column(String(8))
    half_life_s: Mapped[float] = mapped_column(Float)
    half_life_text: Mapped[str | None] = mapped_column(String(64))
    free_cmax_M: Mapped[float] = mapped_column(Float)
    free_cmax_text: Mapped[str | None] = mapped_column(String(64))
    tmax_s: Mapped[float | None] = mapped_column(Float)
    tmax_text: Mapped[str | None] = mapped_column(String(64))
    dosing_interval_s: Mapped[float | None] = mapped_column(Float)
    dosing_interval_text: Mapped[str | None] = mapped_column(String(64))
    source: Mapped[str | None] = mapped_column(String(300))
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AuditEvent(Base):
    """One link of the tamper-evident audit chain.  Append-only (database triggers).

    ``hash`` is SHA-256 over the canonical JSON of every other field (``id``
    included) and ``prev_hash``; see :mod:`tracker.db.audit`.
    """

    __tablename__ = "audit_events"

    id: Mapped[int] = mapped_column(primary_key=True, autoincrement=True)
    at: Mapped[str] = mapped_column(String(40))  # UTC ISO-8601 with microseconds, hashed verbatim
    actor: Mapped[str] = mapped_column(String(100))
    action: Mapped[str] = mapped_column(String(64))
    entity_type: Mapped[str] = mapped_column(String(64))
    entity_id: Mapped[str | None] = mapped_column(String(200))
    before_json: Mapped[str | None] = mapped_column(Text)
    after_json: Mapped[str | None] = mapped_column(Text)
    reason: Mapped[str | None] = mapped_column(Text)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64), unique=True)


class Action(Base):
    """What a lead asked for on a finding: an owner, a due date, a status and a note, linked to compound and rule."""

    __tablename__ = "actions"
    __table_args__ = (CheckConstraint(_in("status", ACTION_STATUSES), name="status_valid"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    rule: Mapped[str] = mapped_column(String(64))
    prompt: Mapped[str | None] = mapped_column(Text)  # the finding's decision prompt when the action was opened
    owner: Mapped[str] = mapped_column(String(100))
    due: Mapped[dt.date] = mapped_column(Date)
    status: Mapped[str] = mapped_column(String(16), default="open")
    note: Mapped[str | None] = mapped_column(Text)
    created_by: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    closed_by: Mapped[str | None] = mapped_column(String(100))
    closed_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)


class GradeSnapshot(Base):
    """A compound's grade and findings, written by the grading service whenever they change (grade history)."""

    __tablename__ = "grade_snapshots"
    __table_args__ = (CheckConstraint(_in("grade", GRADE_VALUES), name="grade_valid"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    compound_id: Mapped[int] = mapped_column(ForeignKey("compounds.id"), index=True)
    grade: Mapped[str] = mapped_column(String(16))
    findings_json: Mapped[str] = mapped_column(Text)  # [[rule, severity], ...] sorted
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow, index=True)


#: Every table, in dependency order (parents first).
TABLES_IN_ORDER: tuple[str, ...] = tuple(t.name for t in Base.metadata.sorted_tables)

__all__ = [
    "Base",
    "NAMING_CONVENTION",
    "APPEND_ONLY_TABLES",
    "TABLES_IN_ORDER",
    "UTCDateTime",
    "utcnow",
    "Program",
    "Compound",
    "User",
    "LoginSession",
    "Signature",
    "RuleConfig",
    "Decision",
    "StageHistory",
    "Potency",
    "TimeCourse",
    "KineticMeasurement",
    "PKProfile",
    "AuditEvent",
    "Action",
    "GradeSnapshot",
    "STAGES",
]
