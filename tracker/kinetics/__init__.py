"""Pure kinetics: published closed forms, fits of raw time courses, assay and PK simulations.

numpy in, numbers out, SI units inside: concentrations in M, times in s, kon in
1/(M*s), koff in 1/s.  Nothing here knows a database, a file or a user
interface.  The flat API below is the notebook entry point::

    >>> import numpy as np
    >>> from tracker.kinetics import fit_dissociation, one_phase_decay
    >>> t = np.linspace(0.0, 3600.0, 40)                    # s
    >>> y = one_phase_decay(t, 1e-3, 1000.0, 50.0)          # koff = 1e-3 /s
    >>> r = fit_dissociation(t, y + np.random.default_rng(1).normal(0, 10, t.size))
    >>> 900 < r.estimates["residence_time"] < 1100          # s, about 1/koff
    True

Modules: :mod:`.equations` (the one module of closed forms),
:mod:`.fitting` (fits returning a frozen :class:`FitResult`), :mod:`.assay`
(incubation artefacts, apparent affinity), :mod:`.pk` and
:mod:`.engagement` (target engagement under PK).  Names are loaded on first
use, so importing this package stays cheap.

Fitted and simulated values support ranking and triage of compounds; they are
not dosing advice.  An underestimated affinity can mean unexpected target
coverage and mechanism-based toxicity: decisions rest with qualified
pharmacologists, local SOPs and regulatory guidance.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover - the names below are what __getattr__ loads
    from .equations import (
        LN2,
        agonist_response,
        association,
        cheng_prusoff_ic50,
        cheng_prusoff_ki,
        depletion_association,
        dissociation,
        induced_fit_kobs,
        jump_dilution_kobs,
        jump_dilution_progress,
        logistic4,
        morrison_fraction,
        motulsky_mahan,
        motulsky_mahan_equilibrium,
        one_phase_association,
        one_phase_decay,
        rate_constants,
        two_phase_decay,
        washout_recovery,
    )
    from .fitting import (
        WEIGHTS,
        CurveModel,
        FitResult,
        fit_association,
        fit_competition_kinetics,
        fit_dissociation,
        fit_insurmountability,
        fit_jump_dilution,
        fit_ki_shift,
        fit_morrison,
        fit_table,
        fit_washout_recovery,
    )

_WHERE = {
    **{name: ".equations" for name in (
        "LN2", "agonist_response", "association", "cheng_prusoff_ic50", "cheng_prusoff_ki",
        "depletion_association", "dissociation", "induced_fit_kobs", "jump_dilution_kobs", "jump_dilution_progress",
        "logistic4", "morrison_fraction", "motulsky_mahan", "motulsky_mahan_equilibrium", "one_phase_association",
        "one_phase_decay", "rate_constants", "two_phase_decay", "washout_recovery",
    )},
    **{name: ".fitting" for name in (
        "WEIGHTS", "CurveModel", "FitResult", "fit_association", "fit_competition_kinetics", "fit_dissociation",
        "fit_insurmountability", "fit_jump_dilution", "fit_ki_shift", "fit_morrison", "fit_table",
        "fit_washout_recovery",
    )},
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    """Load a flat-API name from its module on first use (PEP 562)."""
    where = _WHERE.get(name)
    if where is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(where, __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
