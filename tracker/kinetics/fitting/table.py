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
from .common import replicate_labels
from .doseresponse import fit_insurmountability, fit_ki_shift, fit_morrison
from .recovery import fit_jump_dilution, fit_washout_recovery
from .results import FitResult

_KNOWN_OPTIONS = frozenset({
    "tracer_kon", "tracer_koff", "tracer_conc", "tracer_kd", "koff", "post_dilution_conc", "kapp", "control_label",
    "weights", "receptor_conc", "tracer_kon_ci", "tracer_koff_ci", "n_monte_carlo", "seed", "enzyme_conc",
    "substrate_conc", "km", "two_state", "fit_bottom", "intervals",
})


def fit_table(method: str, df: Any, **options: Any) -> FitResult:
    """Fit ``method`` to a validated SI table.

    Parameters
    ----------
    method : str
        One of :data:`tracker.domain.FIT_METHODS`.
    df : pandas.DataFrame
        Columns ``time`` (s) or ``concentration`` (M), ``signal``, and
        optionally ``curve``, ``replicate`` and ``incubation`` (s).  Replicate
        curves (a ``replicate`` column) are fitted jointly: time courses keep
        one curve per replicate (shared rate constants, own amplitudes);
        dose-response methods pool replicates into their curve.
    **options
        ``weights`` (``none``/``proportional``/``poisson``), ``tracer_kon``
        (1/(M*s)), ``tracer_koff`` (1/s), ``tracer_conc`` (M), ``tracer_kd``
        (M), ``tracer_kon_ci``/``tracer_koff_ci`` ((lo, hi), same units),
        ``n_monte_carlo``, ``seed``, ``koff`` (1/s), ``receptor_conc`` (M),
        ``post_dilution_conc`` (M), ``kapp`` (M), ``enzyme_conc`` (M),
        ``substrate_conc`` (M), ``km`` (M), ``control_label``, ``two_state``,
        ``fit_bottom``, ``intervals``.  ``None`` values mean "not given".

    Returns
    -------
    FitResult
    """
    if method not in METHODS:
        raise FitError(f"unknown fit method {method!r}; choose one of {', '.join(METHODS)}")
    unknown = sorted(k for k, v in options.items() if k not in _KNOWN_OPTIONS and v is not None)
    if unknown:
        raise FitError(f"unknown fit option {unknown[0]!r}")
    opt = {k: v for k, v in options.items() if v is not None}
    cols = set(df.columns)
    n = len(df)
    curve = df["curve"].to_numpy(object) if "curve" in cols else None
    replicate = df["replicate"].to_numpy(object) if "replicate" in cols else None
    conc = df["concentration"].to_numpy(float) if "concentration" in cols else None
    y = df["signal"].to_numpy(float)
    ctrl = opt.get("control_label") or "control"
    common: dict[str, Any] = {k: opt[k] for k in ("weights", "intervals") if k in opt}
    per_replicate = replicate_labels(curve, replicate, n)

    def need(col: str) -> npt.NDArray[np.float64]:
        if col not in cols:
            raise FitError(f"{method} needs a {col!r} column")
        return np.asarray(df[col].to_numpy(float), dtype=np.float64)

    if method == "dissociation":
        return fit_dissociation(need("time"), y, per_replicate, **common)
    if method == "association":
        # replicates at one concentration: joint curves when labelled, pooled by concentration otherwise
        return fit_association(need("time"), y, conc, per_replicate, koff=opt.get("koff"),
                               receptor_conc=opt.get("receptor_conc"), two_state=opt.get("two_state", True), **common)
    if method == "competition-kinetics":
        return fit_competition_kinetics(
            need("time"), y, need("concentration"), curve=curve, tracer_kon=opt.get("tracer_kon"),
            tracer_koff=opt.get("tracer_koff"), tracer_conc=opt.get("tracer_conc"),
            tracer_kon_ci=opt.get("tracer_kon_ci"), tracer_koff_ci=opt.get("tracer_koff_ci"),
            n_monte_carlo=int(opt.get("n_monte_carlo", 100)), seed=int(opt.get("seed", 0)),
            receptor_conc=opt.get("receptor_conc"), **common,
        )
    if method == "jump-dilution":
        return fit_jump_dilution(need("time"), y, per_replicate, control_label=ctrl,
                                 post_dilution_conc=opt.get("post_dilution_conc"), kapp=opt.get("kapp"), **common)
    if method == "washout-recovery":
        return fit_washout_recovery(need("time"), y, per_replicate, control_label=ctrl, **common)
    if method == "ki-shift":
        if "incubation" not in cols:
            raise FitError("ki-shift needs an 'incubation' column or curve labels that are times (e.g. '30 min')")
        return fit_ki_shift(need("concentration"), y, df["incubation"].to_numpy(float), labels=curve,
                            tracer_conc=opt.get("tracer_conc"), tracer_kd=opt.get("tracer_kd"), **common)
    if method == "morrison":
        if "enzyme_conc" not in opt:
            raise FitError("morrison needs the active enzyme concentration (enzyme_conc, M)")
        return fit_morrison(need("concentration"), y, float(opt["enzyme_conc"]),
                            substrate_conc=opt.get("substrate_conc"), km=opt.get("km"),
                            fit_bottom=bool(opt.get("fit_bottom", True)), **common)
    return fit_insurmountability(need("concentration"), y, curve, control_label=ctrl, **common)
