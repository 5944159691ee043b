"""Vocabulary of the domain: stages and the enumerated values of records.

Plain Python, no SQLAlchemy: the rules layer, the importer and the database
models all read their allowed values from here, so there is one list of each.
Migrations freeze a copy of these lists in their CHECK constraints; adding a
value here therefore needs a new Alembic revision.
"""

from __future__ import annotations

#: Stages a compound moves through, in order (``common practice`` in small-molecule discovery).
STAGES: tuple[str, ...] = (
    "hit",
    "hit-to-lead",
    "lead-optimization",
    "advanced-lead",
    "candidate",
    "clinical",
)

#: Potency readouts: what the reported number is.
READOUTS: tuple[str, ...] = ("IC50", "Ki", "KD", "EC50", "Kb")

#: Assay formats of a potency measurement.
FORMATS: tuple[str, ...] = ("binding", "competition-binding", "functional", "enzyme")

#: Methods a kinetic measurement (or a raw time course) comes from.
METHODS: tuple[str, ...] = (
    "spr",
    "competition-kinetics",
    "association-dissociation",
    "jump-dilution",
    "washout-recovery",
    "other",
)

#: Fit methods of raw time courses and dose-response sets (``krt fit METHOD``).
FIT_METHODS: tuple[str, ...] = (
    "dissociation",
    "association",
    "competition-kinetics",
    "jump-dilution",
    "washout-recovery",
    "ki-shift",
    "insurmountability",
    "morrison",
)

#: Routes of administration of a PK profile.
ROUTES: tuple[str, ...] = ("oral", "iv")

#: Roles of users: leads decide on gates, scientists record data, viewers read.
ROLES: tuple[str, ...] = ("lead", "scientist", "viewer")

#: Outcomes of a gate decision.
OUTCOMES: tuple[str, ...] = ("approved", "refused")

#: Meanings of an electronic signature on a gate decision (21 CFR Part 11 §11.50(a)(3)):
#: the decider ``approved`` or was ``refused``; a lead ``waived`` findings; a second lead
#: ``co-signed`` a waiver (two-person rule).
SIGNATURE_MEANINGS: tuple[str, ...] = ("approved", "refused", "waived", "co-signed")

#: Status of an action taken on a finding (``open`` until done or dropped).
ACTION_STATUSES: tuple[str, ...] = ("open", "done", "dropped")

#: Grades of the grading layer, worst first (``clear`` = no finding).
GRADE_VALUES: tuple[str, ...] = ("high", "moderate", "low", "clear")


def stage_index(stage: str) -> int:
    """Position of ``stage`` in :data:`STAGES` (raises ``ValueError`` for an unknown stage)."""
    return STAGES.index(stage)


def normalise_token(text: str) -> str:
    """Lower-case, spaces and underscores as hyphens: ``'Lead Optimization'`` -> ``'lead-optimization'``."""
    return "-".join(str(text).strip().lower().replace("_", " ").split())


def canonical(value: str, allowed: tuple[str, ...]) -> str | None:
    """The member of ``allowed`` that ``value`` names, ignoring case, spaces and underscores; else ``None``."""
    key = normalise_token(value)
    for item in allowed:
        if normalise_token(item) == key:
            return item
    return None


__all__ = ["STAGES", "READOUTS", "FORMATS", "METHODS", "FIT_METHODS", "ROUTES", "ROLES", "OUTCOMES", "SIGNATURE_MEANINGS", "stage_index", "canonical", "normalise_token"]
