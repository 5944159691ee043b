"""The open import/export format: one CSV file (or one ``.xlsx`` sheet) per table.

Column names are a contract; don't rename them.  Quantity cells carry their
unit (``3.2 nM``, ``30 min``, ``1e6 /M/s``); the text is stored next to the SI
value and written back on export, so a round trip is lossless.

==========  ==================================================================
table       columns (required first; ``*`` = optional)
==========  ==================================================================
programs    program, target*, intended_profile*, engagement_threshold*,
            onset_max*, duration_min*, offset_max*, dosing_interval*,
            target_half_life*
compounds   compound, program, series*, stage, smiles*
potency     compound, assay, readout, value, incubation, format,
            tracer_conc*, tracer_kd*, tracer_residence_time*,
            max_response_fraction*, date*, source*, preincubation*,
            max_incubation*, target_conc*
kinetics    compound, method, kon*, koff | residence_time, kd*,
            kon_low*, kon_high*, koff_low*, koff_high*, date*, source*
pk          compound, species, route, half_life, free_cmax, tmax (oral),
            dosing_interval*, source*
==========  ==================================================================
"""

from __future__ import annotations

from dataclasses import dataclass

from ..domain import FORMATS, METHODS, READOUTS, ROUTES, STAGES


@dataclass(frozen=True)
class Col:
    """One column of the format.

    ``kind`` is ``"text"``, ``"enum"``, ``"date"``, ``"ref"`` or a quantity kind
    of :mod:`tracker.units`.  Quantity columns map to ``<db>`` (SI float) and
    ``<text_db>`` (the original text).
    """

    name: str
    kind: str = "text"
    required: bool = False
    db: str | None = None
    text_db: str | None = None
    positive: bool = True
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] = ()
    ref: str | None = None  # table referenced by a "ref" column
    max_len: int = 200
    #: added after the first version of the format: enters a row's content hash only when filled,
    #: so rows imported before the column existed keep their hashes (re-imports add nothing twice)
    added: bool = False

    @property
    def is_quantity(self) -> bool:
        return self.kind in ("concentration", "time", "rate1", "rate2", "fraction")


@dataclass(frozen=True)
class TableSpec:
    name: str  # file / sheet name
    db_table: str
    columns: tuple[Col, ...]
    key: str | None = None  # entity tables: the unique name column
    hashed: bool = False  # measurement tables: content hash per row

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns)

    @property
    def required(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns if c.required)

    def col(self, name: str) -> Col:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)


def _q(name: str, kind: str, si_suffix: str, required: bool = False, **kw) -> Col:
    db = f"{name}_{si_suffix}" if si_suffix else name
    return Col(name, kind, required, db=db, text_db=f"{name}_text", **kw)


PROGRAMS = TableSpec(
    "programs",
    "programs",
    (
        Col("program", required=True, db="name"),
        Col("target", db="target"),
        Col("intended_profile", db="intended_profile", max_len=100),
        _q("engagement_threshold", "fraction", "", high=1.0),
        _q("onset_max", "time", "s"),
        _q("duration_min", "time", "s"),
        _q("offset_max", "time", "s"),
        _q("dosing_interval", "time", "s"),
        _q("target_half_life", "time", "s"),
    ),
    key="program",
)

COMPOUNDS = TableSpec(
    "compounds",
    "compounds",
    (
        Col("compound", required=True, db="name"),
        Col("program", "ref", required=True, db="program_id", ref="programs"),
        Col("series", db="series"),
        Col("stage", "enum", required=True, db="stage", choices=STAGES),
        Col("smiles", db="smiles", max_len=100_000),
    ),
    key="compound",
)

_COMPOUND_REF = Col("compound", "ref", required=True, db="compound_id", ref="compounds")
_DATE = Col("date", "date", db="measured_on")
_SOURCE = Col("source", db="source", max_len=300)

POTENCY = TableSpec(
    "potency",
    "potency",
    (
        _COMPOUND_REF,
        Col("assay", required=True, db="assay"),
        Col("readout", "enum", required=True, db="readout", choices=READOUTS),
        Col("value", "concentration", True, db="value_M", text_db="value_text"),
        _q("incubation", "time", "s", required=True),
        Col("format", "enum", required=True, db="format", choices=FORMATS),
        _q("tracer_conc", "concentration", "M"),
        _q("tracer_kd", "concentration", "M"),
        _q("tracer_residence_time", "time", "s"),
        _q("max_response_fraction", "fraction", "", positive=False),
        _DATE,
        _SOURCE,
        # assay conditions the evidence model simulates (tracker.rules.evidence): the compound's pre-incubation
        # with the target before the read starts, the longest incubation the assay can practically run, and the
        # enzyme or receptor concentration in the well (tight binding, tracer depletion)
        _q("preincubation", "time", "s", positive=False, added=True),
        _q("max_incubation", "time", "s", added=True),
        _q("target_conc", "concentration", "M", added=True),
    ),
    hashed=True,
)

KINETICS = TableSpec(
    "kinetics",
    "kinetic_measurements",
    (
        _COMPOUND_REF,
        Col("method", "enum", required=True, db="method", choices=METHODS),
        _q("kon", "rate2", "per_M_s"),
        _q("koff", "rate1", "per_s"),
        Col("residence_time", "time", db=None, text_db=None),  # stored as koff = 1/RT, text kept in koff_text
        _q("kd", "concentration", "M"),
        _q("kon_low", "rate2", "per_M_s"),
        _q("kon_high", "rate2", "per_M_s"),
        _q("koff_low", "rate1", "per_s"),
        _q("koff_high", "rate1", "per_s"),
        _DATE,
        _SOURCE,
    ),
    hashed=True,
)

PK = TableSpec(
    "pk",
    "pk_profiles",
    (
        _COMPOUND_REF,
        Col("species", required=True, db="species", max_len=64),
        Col("route", "enum", required=True, db="route", choices=ROUTES),
        _q("half_life", "time", "s", required=True),
        _q("free_cmax", "concentration", "M", required=True),
        _q("tmax", "time", "s"),
        _q("dosing_interval", "time", "s"),
        _SOURCE,
    ),
    hashed=True,
)

#: Tables of the format in dependency order (parents first).
SPECS: dict[str, TableSpec] = {s.name: s for s in (PROGRAMS, COMPOUNDS, POTENCY, KINETICS, PK)}
ORDER: tuple[str, ...] = tuple(SPECS)


def table_for_name(stem: str) -> str | None:
    """The table a file or sheet name stands for: ``potency.csv``, ``potency_2026-03``, ``PK``, ``pk-rat``.

    The name must equal a table name or start with it followed by ``_``, ``-``,
    ``.`` or a space.  Longest table name wins.
    """
    s = stem.strip().lower()
    for name in sorted(SPECS, key=len, reverse=True):
        if s == name or (s.startswith(name) and s[len(name)] in "_-. "):
            return name
    return None


__all__ = ["Col", "TableSpec", "SPECS", "ORDER", "PROGRAMS", "COMPOUNDS", "POTENCY", "KINETICS", "PK", "table_for_name"]
