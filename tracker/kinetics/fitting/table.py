"""The table dispatcher: one validated SI table in, one :class:`FitResult` out."""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from ...domain import FIT_METHODS as METHODS
from ...errors import FitError
from .association import fit_association
from .competition import fit_competition_kinetics
from .decay import fit_dissociation
from .doseresponse import fit_insurmountability, fit_ki_shift
from .recovery import fit_jump_dilution, fit_washout_recovery
from .results import FitResult

def fit_table(method: str, df: Any, **options: Any) -> FitResult:
    """Fit ``method`` to a validated SI table (columns ``time``/``concentration``,
    ``signal``, optional ``curve`` and ``incubation``).

    ``options``: ``tracer_kon``, ``tracer_koff``, ``tracer_conc``, ``tracer_kd``,
    ``koff``, ``post_dilution_conc``, ``kapp``, ``control_label`` (SI floats).
    """
    if method not in METHODS:
        raise FitError(f"unknown fit method {method!r}; choose one of {', '.join(METHODS)}")
    cols = set(df.columns)
    curve = df["curve"].to_numpy(object) if "curve" in cols else None
    conc = df["concentration"].to_numpy(float) if "concentration" in cols else None
    y = df["signal"].to_numpy(float)
    ctrl = options.get("control_label") or "control"

    def need(col: str) -> npt.NDArray[np.float64]:
        if col not in cols:
            raise FitError(f"{method} needs a {col!r} column")
        return np.asarray(df[col].to_numpy(float), dtype=np.float64)

    if method == "dissociation":
        return fit_dissociation(need("time"), y, curve)
    if method == "association":
        return fit_association(need("time"), y, conc, curve, koff=options.get("koff"))
    if method == "competition-kinetics":
        return fit_competition_kinetics(
            need("time"), y, need("concentration"), curve=curve, tracer_kon=options.get("tracer_kon"),
            tracer_koff=options.get("tracer_koff"), tracer_conc=options.get("tracer_conc"),
        )
    if method == "jump-dilution":
        return fit_jump_dilution(need("time"), y, curve, control_label=ctrl,
                                 post_dilution_conc=options.get("post_dilution_conc"), kapp=options.get("kapp"))
    if method == "washout-recovery":
        return fit_washout_recovery(need("time"), y, curve, control_label=ctrl)
    if method == "ki-shift":
        if "incubation" not in cols:
            raise FitError("ki-shift needs an 'incubation' column or curve labels that are times (e.g. '30 min')")
        return fit_ki_shift(need("concentration"), y, df["incubation"].to_numpy(float), labels=curve,
                            tracer_conc=options.get("tracer_conc"), tracer_kd=options.get("tracer_kd"))
    return fit_insurmountability(need("concentration"), y, curve, control_label=ctrl)
