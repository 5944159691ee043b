"""Kinetic-risk rules: one pure ``check_*`` per rule, one versioned configuration, one grader.

``config``   :class:`RuleConfig`, the shipped :data:`DEFAULTS` (each with its source) and
             the rule-set version recorded with gate decisions.
``checks``   ``check_affinity_underestimate``, ``check_ki_shift``, ``check_insurmountability``,
             ``check_assay_floor``, ``check_residence_time_unmeasured``,
             ``check_duration_mismatch``: DataFrames in, findings frames out.
``grader``   :func:`grade_frames`: every rule over a whole portfolio in one vectorised pass.

Rule ids: ``residence-time-unmeasured``, ``affinity-underestimate``, ``duration-mismatch``.
Grades: ``high`` > ``moderate`` > ``low`` > ``clear`` (``clear``: no finding).
"""

from .config import DEFAULTS, GRADES, RULES, RULESET_VERSION, SEVERITIES, RuleConfig

__all__ = ["DEFAULTS", "GRADES", "RULES", "RULESET_VERSION", "SEVERITIES", "RuleConfig", "GradeResult", "Portfolio", "grade_frames"]

_FROM_GRADER = ("GradeResult", "Portfolio", "grade_frames")


def __getattr__(name: str):
    # the grader pulls in the simulations (scipy); import it on first use, so that reading the
    # configuration (``krt gate`` builds its parser from it) does not cost every command that import
    if name in _FROM_GRADER:
        from . import grader

        return getattr(grader, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
