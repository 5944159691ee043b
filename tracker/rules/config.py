"""The versioned rule configuration: thresholds of every rule, in one place.

:data:`DEFAULTS` is the rule set shipped with the tracker; bump
:data:`RULESET_VERSION` whenever a default or a rule's logic changes, because
gate decisions record the version they were graded under.  A program may
override any threshold; overrides are stored (append-only by convention: each
change adds a new ``version`` row) in the ``rule_configs`` table as JSON of the
changed keys only, written by :func:`tracker.services.grading.set_rule_override`
which also appends an audit event.  A row with ``program_id`` NULL overrides
the defaults for every program; a program's own row overrides that.

Every default carries its source in a comment:
``common practice`` (a fact of the trade, unsourced), ``from memory`` (recalled
without a checked source) or ``design choice`` (our own decision, with the
reason).  This module is plain Python: no database, no pandas.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, fields, replace
from typing import Any, Mapping

from ..domain import STAGES, canonical
from ..errors import InputError

#: Identifier of the shipped rules and defaults; recorded with every gate decision.
RULESET_VERSION = "krt-rules-2"

#: Rule ids (ours).  ``stage-skip`` is not a rule but a waivable gate condition.
RULES: tuple[str, ...] = ("residence-time-unmeasured", "affinity-underestimate", "duration-mismatch", "conflicting-kinetics",
                          "affinity-overestimate", "tight-binding-limit", "potency-below-floor")
STAGE_SKIP = "stage-skip"
WAIVABLE: tuple[str, ...] = RULES + (STAGE_SKIP,)

#: Grades, worst first.  ``clear`` = no finding at all (distinct from ``low``).
SEVERITIES: tuple[str, ...] = ("high", "moderate", "low")
GRADES: tuple[str, ...] = SEVERITIES + ("clear",)
SEVERITY_RANK: dict[str, int] = {"clear": 0, "low": 1, "moderate": 2, "high": 3}


@dataclass(frozen=True)
class RuleConfig:
    """Thresholds of the three rules.  Frozen; build variants with :meth:`with_overrides`.

    All times in s, concentrations in M, rates in SI (see :mod:`tracker.units`).
    """

    # ---- affinity-underestimate, residence time known
    #: incubate for at least this multiple of RT (common practice: >= 2 x RT)
    incubation_multiple: float = 2.0
    #: apparent/true affinity accepted as "read correctly" (common practice: 1.25-fold)
    fold_tolerance: float = 1.25
    #: fold shift from which the shift itself counts as moderate / high evidence
    #: (design choice: 3x is beyond typical assay replicate scatter of ~2-3x, common
    #: practice; 10x moves a compound by a log unit, i.e. across potency cut-offs)
    fold_moderate: float = 3.0
    fold_high: float = 10.0

    # ---- affinity-underestimate, residence time unknown ("likely")
    #: Ki(short)/Ki(long) above which a compound is a slow dissociator (common practice: ~6)
    ki_shift_threshold: float = 6.0
    #: a Ki-shift ratio below this shows no shift (design choice: 1.5-fold is within
    #: replicate variability of potency assays, common practice; the same default as
    #: the ratio tolerance of tracker.kinetics.assay.residence_time_bounds)
    no_shift_ratio: float = 1.5
    #: insurmountable when the agonist maximum with antagonist falls below this fraction
    #: of control (common practice: a >20% depression of Emax is beyond the ~10%
    #: replicate scatter of a maximal response; receptor reserve can still hide it)
    insurmountable_fraction: float = 0.8
    #: a depression to below this fraction counts as strong evidence (design choice:
    #: half the maximum gone cannot be replicate noise)
    insurmountable_strong_fraction: float = 0.5
    #: potency within this factor of the assay floor ln2/(kon t) is "at the floor"
    #: (design choice, the factor of tracker.kinetics.assay.near_assay_floor)
    floor_factor: float = 2.0
    #: kon assumed for the floor when the series has no measured kon
    #: (from memory: typical small-molecule kon 1e5-1e8 /M/s; 1e6 is a central value)
    assumed_kon_per_M_s: float = 1e6
    #: plausible kon range for residence-time bounds from a Ki shift (from memory, as above)
    kon_low_per_M_s: float = 1e5
    kon_high_per_M_s: float = 1e8

    #: a potency this many times tighter than the assay floor contradicts the kon used for the floor
    #: (design choice: beyond the 2-3x replicate scatter of potency assays, common practice, so
    #: the reading cannot be a noisy floor value; reported as a data or kon question)
    below_floor_factor: float = 3.0

    # ---- affinity-underestimate / affinity-overestimate, the recommended incubation
    #: longest incubation an assay can practically run when the potency row gives no
    #: max_incubation (common practice: plate assays run up to overnight, ~16-24 h, before
    #: enzyme, cell or reagent stability fails); beyond it a kinetic method is recommended
    max_incubation_s: float = 86400.0

    # ---- conflicting-kinetics
    #: kinetic measurements of one compound whose residence times differ by more than this
    #: fold conflict (design choice: 3x is beyond the ~2x between-run scatter of kinetic
    #: methods such as SPR or competition kinetics, common practice)
    conflict_fold: float = 3.0

    # ---- tight-binding-limit
    #: a reading within this factor of the titration limit ([E]/2 for an IC50; Morrison 1969,
    #: Biochim Biophys Acta 185:269-286, volume and pages from memory) is a likely underestimate
    #: (design choice: 2x, as the issue of this rule states)
    tight_binding_factor: float = 2.0

    # ---- duration-mismatch
    #: engagement threshold used when a program sets time limits but no threshold
    #: (design choice: half occupancy, the conventional midpoint; say so in the finding)
    default_engagement_threshold: float = 0.5
    #: bound target is degraded at this multiple of the free target's rate when the program gives a
    #: target half-life (design choice: 1, "degraded alike", unless a program knows that binding
    #: protects the target (< 1) or speeds its removal (> 1))
    bound_target_degradation_factor: float = 1.0

    # ---- gates: two-person rule for waivers
    #: waivers on a move into this stage or later need a second lead's signature, given as
    #: the stage's position in tracker.domain.STAGES (0 hit ... 4 candidate, 5 clinical; 6 =
    #: never); ``krt rules set two_person_waiver_stage=candidate`` takes a stage name too
    #: (design choice: the candidate -> clinical step is the one that reaches patients)
    two_person_waiver_stage: float = 5.0

    def __post_init__(self):
        problems = validate_values(asdict(self))
        if problems:
            raise InputError("; ".join(problems))

    def with_overrides(self, overrides: Mapping[str, Any] | None) -> RuleConfig:
        """A copy with ``overrides`` (a dict of field -> value) applied; unknown keys refused."""
        if not overrides:
            return self
        clean = coerce_overrides(overrides)
        return replace(self, **clean)

    def to_dict(self) -> dict[str, float]:
        return {k: float(v) for k, v in asdict(self).items()}


FIELD_NAMES: tuple[str, ...] = tuple(f.name for f in fields(RuleConfig))
#: settings that name a stage (stored as its position in :data:`tracker.domain.STAGES`)
STAGE_SETTINGS: tuple[str, ...] = ("two_person_waiver_stage",)

#: Per-field sanity limits (checked for defaults and overrides alike).
_LIMITS: dict[str, tuple[float, float, str]] = {
    "incubation_multiple": (0.1, 100.0, "a multiple of RT"),
    "fold_tolerance": (1.0, 100.0, "a fold > 1"),
    "fold_moderate": (1.0, 1e6, "a fold > 1"),
    "fold_high": (1.0, 1e6, "a fold > 1"),
    "ki_shift_threshold": (1.0, 1e6, "a ratio > 1"),
    "no_shift_ratio": (1.0, 1e6, "a ratio > 1"),
    "insurmountable_fraction": (0.0, 1.0, "a fraction between 0 and 1"),
    "insurmountable_strong_fraction": (0.0, 1.0, "a fraction between 0 and 1"),
    "floor_factor": (1.0, 1e3, "a factor >= 1"),
    "assumed_kon_per_M_s": (1.0, 1e10, "a kon in /M/s up to the diffusion limit 1e10"),
    "kon_low_per_M_s": (1.0, 1e10, "a kon in /M/s up to the diffusion limit 1e10"),
    "kon_high_per_M_s": (1.0, 1e10, "a kon in /M/s up to the diffusion limit 1e10"),
    "default_engagement_threshold": (0.0, 1.0, "an occupancy between 0 and 1"),
    "below_floor_factor": (1.0, 1e6, "a factor >= 1"),
    "max_incubation_s": (1.0, 365 * 86400.0, "a time in s"),
    "conflict_fold": (1.0, 1e6, "a fold > 1"),
    "tight_binding_factor": (1.0, 1e3, "a factor >= 1"),
    "bound_target_degradation_factor": (0.0, 100.0, "a factor between 0 and 100"),
    "two_person_waiver_stage": (1.0, 6.0, "a stage (hit-to-lead ... clinical) or its position 1-6 (6: never)"),
}
_STRICT_LOW = {"fold_tolerance", "fold_moderate", "fold_high", "ki_shift_threshold", "no_shift_ratio",
               "insurmountable_fraction", "insurmountable_strong_fraction", "default_engagement_threshold", "conflict_fold"}


def validate_values(values: Mapping[str, float]) -> list[str]:
    """Problems with a full set of values (limits per field and their order), as one-line texts."""
    problems = []
    for name, value in values.items():
        lo, hi, what = _LIMITS[name]
        v = float(value)
        below = v <= lo if name in _STRICT_LOW else v < lo
        if not math.isfinite(v) or below or v > hi or (name == "default_engagement_threshold" and v >= 1.0):
            problems.append(f"rule setting {name} = {value!r} must be {what}")
    if problems:
        return problems
    if values["fold_moderate"] > values["fold_high"]:
        problems.append("fold_moderate must not exceed fold_high")
    if values["fold_tolerance"] > values["fold_moderate"]:
        problems.append("fold_tolerance must not exceed fold_moderate")
    if values["no_shift_ratio"] >= values["ki_shift_threshold"]:
        problems.append("no_shift_ratio must be below ki_shift_threshold")
    if values["insurmountable_strong_fraction"] > values["insurmountable_fraction"]:
        problems.append("insurmountable_strong_fraction must not exceed insurmountable_fraction")
    if values["kon_low_per_M_s"] > values["kon_high_per_M_s"]:
        problems.append("kon_low_per_M_s must not exceed kon_high_per_M_s")
    return problems


def coerce_overrides(overrides: Mapping[str, Any]) -> dict[str, float]:
    """``{field: float}`` from user text or numbers; unknown fields and non-numbers refused."""
    out: dict[str, float] = {}
    for key, value in overrides.items():
        name = str(key).strip().replace("-", "_")
        if name not in FIELD_NAMES:
            raise InputError(f"unknown rule setting {key!r} (known: {', '.join(FIELD_NAMES)})")
        if name in STAGE_SETTINGS and isinstance(value, str) and canonical(value, STAGES) is not None:
            value = STAGES.index(canonical(value, STAGES))
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise InputError(f"rule setting {name} needs a number, got {value!r}") from None
        out[name] = v
    return out


#: The shipped defaults (version :data:`RULESET_VERSION`).
DEFAULTS = RuleConfig()


def effective(global_override: Mapping[str, Any] | None = None, program_override: Mapping[str, Any] | None = None) -> RuleConfig:
    """Defaults, then the global override, then the program's own override."""
    return DEFAULTS.with_overrides(global_override).with_overrides(program_override)


def version_label(global_version: int | None = None, program_id: int | None = None, program_version: int | None = None) -> str:
    """Rule-set version as recorded with decisions: ``krt-rules-2``, ``krt-rules-2+g2+p7v3``."""
    label = RULESET_VERSION
    if global_version:
        label += f"+g{int(global_version)}"
    if program_id is not None and program_version:
        label += f"+p{int(program_id)}v{int(program_version)}"
    return label


def parse_json(text: str | None) -> dict[str, float]:
    """An override stored as JSON text (``None`` -> empty)."""
    if not text:
        return {}
    return coerce_overrides(json.loads(text))


__all__ = [
    "RuleConfig",
    "DEFAULTS",
    "RULESET_VERSION",
    "RULES",
    "STAGE_SKIP",
    "WAIVABLE",
    "SEVERITIES",
    "GRADES",
    "SEVERITY_RANK",
    "FIELD_NAMES",
    "effective",
    "version_label",
    "coerce_overrides",
    "validate_values",
    "parse_json",
]
