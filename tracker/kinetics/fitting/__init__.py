"""Fits of raw kinetic time courses and dose-response sets.

Three layers, in the manner of small curve-fitting libraries:

1. closed forms (:mod:`tracker.kinetics.equations`, the one module of them)
   and the curve functions built on them (:mod:`.curves`), plain numpy
   functions of ``x`` and named parameters;
2. one ``fit_<method>`` function per experiment type that picks starting values
   from the data itself (a grid over the rate constant with the linear
   parameters solved exactly at each grid point, so hidden data sets need no
   hand-tuned guesses) and states its model, parameters and warnings;
3. one least-squares engine (:func:`scipy.optimize.least_squares`, rate
   constants fitted as log10 values, several curves fitted globally on
   concatenated residuals with shared parameters).

Every fit returns a frozen :class:`FitResult` with SI estimates, 95% intervals
and which kind they are, quality figures, warning codes, and a
:class:`CurveModel` that redraws each fitted curve with a confidence band.

Intervals
---------
Covariance intervals follow the usual recipe: s^2 = 2*cost/dof,
cov = s^2*pinv(J^T J), estimate +- t(0.975, dof)*se in the fitted (log10) scale.
For the headline parameters (rate constants, fractions) the engine checks that
recipe: if the parameter sits at a fitting limit, the covariance is singular,
or the sum of squares at the covariance limits differs from the F threshold by
more than about a third (a strongly non-linear problem), the interval is a
profile instead (the parameter fixed on a grid, the others refitted, until the
sum of squares rises by t^2*s^2, the F(1, dof) threshold).  ``ci_kind`` reports
``'profile'`` when any headline interval is a profile.  A profile that reaches
the fitting limit without crossing the threshold is *open* (``0``/``inf``, JSON
``null``) and raises the ``ci-open`` warning.

Methods
-------
``dissociation``, ``association``, ``competition-kinetics`` (Motulsky & Mahan
1984), ``jump-dilution``, ``washout-recovery``, ``ki-shift``,
``insurmountability``, ``morrison`` (tight binding); see each ``fit_*`` function for the model, the curve
layout and the warnings.  :func:`fit_table` dispatches a validated SI table (see its docstring).

Fitted values support ranking and triage of compounds.  They are not dosing
advice: an underestimated affinity can mean unexpected target coverage and
mechanism-based toxicity, so decisions rest with qualified pharmacologists,
local SOPs and regulators.

Modules
-------
``engine`` (parameters, problem, solvers, weights), ``intervals``
(covariance and profile intervals), ``results`` (:class:`FitResult`,
:class:`CurveModel`), ``curves`` (curve functions), ``common`` (shared
checks), one module per method family (``decay``, ``association``,
``competition``, ``recovery``, ``doseresponse``) and ``table`` (the
dispatcher).
"""

from __future__ import annotations

from ...domain import FIT_METHODS as METHODS
from .association import fit_association
from .competition import fit_competition_kinetics
from .curves import CURVE_FUNCTIONS, CurveInfo
from .decay import fit_dissociation
from .doseresponse import fit_insurmountability, fit_ki_shift, fit_morrison
from .engine import HILL_LIMITS, IC50_LIMITS, KOFF_LIMITS, KON_LIMITS, WEIGHTS, Param
from .recovery import fit_jump_dilution, fit_washout_recovery
from .results import JSON_KEYS, SCHEMA_VERSION, CurveModel, FitResult
from .table import fit_table

__all__ = [
    "CURVE_FUNCTIONS",
    "HILL_LIMITS",
    "IC50_LIMITS",
    "JSON_KEYS",
    "KOFF_LIMITS",
    "KON_LIMITS",
    "METHODS",
    "SCHEMA_VERSION",
    "WEIGHTS",
    "CurveInfo",
    "CurveModel",
    "FitResult",
    "Param",
    "fit_association",
    "fit_competition_kinetics",
    "fit_dissociation",
    "fit_insurmountability",
    "fit_jump_dilution",
    "fit_ki_shift",
    "fit_morrison",
    "fit_table",
    "fit_washout_recovery",
]
