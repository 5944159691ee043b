"""Fit options: which apply to which method, what they mean, and their conversion to SI.

Kept free of pandas and SQLAlchemy so the CLI can build its parser (and the
dashboard its inputs) from :data:`FIT_OPTIONS` without loading the database
layer.  :func:`fit_options` is the one place where option texts become the SI
floats :func:`tracker.kinetics.fit_table` takes.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ..domain import FIT_METHODS
from ..errors import KrtError, UnitError
from ..units import parse_quantity

__all__ = ["WEIGHTS", "FIT_OPTIONS", "fit_options"]

#: weighting schemes of every fit, with when to use each (the CLI help and the dashboard show these texts)
WEIGHTS = {
    "none": "constant noise across the trace (the default; most binding and absorbance reads)",
    "proportional": "noise that grows with the signal, a constant CV (many fluorescence and luminescence plate reads)",
    "poisson": "counting noise, variance proportional to the signal (radioligand cpm, photon counting)",
}

_ALL = FIT_METHODS
#: option -> (kind of quantity or "text"/"choice"/"interval:<kind>", methods it applies to, help)
FIT_OPTIONS: dict[str, tuple[str, tuple[str, ...], str]] = {
    "weights": ("choice", _ALL, "noise model: " + "; ".join(f"{k} = {v}" for k, v in WEIGHTS.items())),
    "tracer_kon": ("rate2", ("competition-kinetics",), "tracer kon, e.g. '3e6 /M/s'"),
    "tracer_koff": ("rate1", ("competition-kinetics",), "tracer koff, e.g. '0.01 /s'"),
    "tracer_conc": ("concentration", ("competition-kinetics", "ki-shift"), "tracer concentration, e.g. '1 nM'"),
    "tracer_kd": ("concentration", ("ki-shift",), "tracer KD for Cheng-Prusoff, e.g. '2 nM'"),
    "tracer_kon_ci": ("interval:rate2", ("competition-kinetics",),
                      "95% interval of the tracer kon, LO,HI, e.g. '2e6,4e6 /M/s': carried into the competitor's "
                      "intervals by a seeded Monte Carlo"),
    "tracer_koff_ci": ("interval:rate1", ("competition-kinetics",),
                       "95% interval of the tracer koff, LO,HI, e.g. '0.008,0.012 /s' (seeded Monte Carlo)"),
    "receptor_conc": ("concentration", ("association", "competition-kinetics"),
                      "receptor (binding site) concentration, e.g. '0.5 nM': switches to the depletion-aware model"),
    "koff": ("rate1", ("association",), "known koff, e.g. '1e-3 /s' (association at one concentration gives kon)"),
    "post_dilution_conc": ("concentration0", ("jump-dilution",), "inhibitor left after the dilution (jump-dilution correction)"),
    "kapp": ("concentration", ("jump-dilution",), "apparent Ki under assay conditions (jump-dilution correction)"),
    "enzyme_conc": ("concentration", ("morrison",), "active enzyme concentration, e.g. '2 nM' (required by morrison)"),
    "substrate_conc": ("concentration", ("morrison",), "substrate concentration (with --km: Ki of a competitive inhibitor)"),
    "km": ("concentration", ("morrison",), "substrate Km (with --substrate-conc)"),
    "control_label": ("text", ("jump-dilution", "washout-recovery", "insurmountability"),
                      "curve label of the control trace (default 'control')"),
}


def _flag(dest: str) -> str:
    return "--" + dest.replace("_", "-")


def _interval(text: str, kind: str) -> tuple[float, float]:
    """``'2e6,4e6 /M/s'`` or ``'2e6 /M/s, 4e6 /M/s'`` -> (lo, hi) in SI; a bare LO takes HI's unit."""
    parts = [p.strip() for p in str(text).split(",")]
    if len(parts) != 2 or not all(parts):
        raise UnitError(f"give the interval as LO,HI with a unit, e.g. '{_EXAMPLE_CI[kind]}' (got {text!r})")
    hi = parse_quantity(parts[1], kind)
    lo = parse_quantity(parts[0], kind, default_unit=hi.unit)
    if not lo.si < hi.si:
        raise UnitError(f"the interval's low end must be below its high end (got {text!r})")
    return lo.si, hi.si


_EXAMPLE_CI = {"rate2": "2e6,4e6 /M/s", "rate1": "0.008,0.012 /s"}


def fit_options(method: str, given: dict[str, Any], name: Callable[[str], str] = _flag) -> dict[str, Any]:
    """Check and convert option texts (``{'tracer_kon': '3e6 /M/s', ...}``; ``None`` = not given) to SI.

    The one place where fit options are read, for the CLI and the dashboard; ``name(dest)`` names an option
    in messages (``--tracer-kon`` on the command line).  Raises :class:`~tracker.errors.KrtError` subclasses.
    """
    out: dict[str, Any] = {}
    for dest, value in given.items():
        if value is None or (isinstance(value, str) and not value.strip()):
            continue
        if dest not in FIT_OPTIONS:
            raise KrtError(f"unknown fit option {name(dest)}")
        kind, methods, _help = FIT_OPTIONS[dest]
        if method not in methods:
            raise KrtError(f"{name(dest)} does not apply to {method} (it is used by {', '.join(methods)})")
        try:
            if kind == "text":
                out[dest] = str(value)
            elif kind == "choice":
                if value not in WEIGHTS:
                    raise UnitError(f"unknown weighting {value!r}; use one of {', '.join(WEIGHTS)}")
                out[dest] = value
            elif kind.startswith("interval:"):
                out[dest] = _interval(value, kind.split(":", 1)[1])
            elif kind == "concentration0":
                out[dest] = parse_quantity(value, "concentration", positive=False).si
            else:
                out[dest] = parse_quantity(value, kind).si
        except UnitError as exc:
            raise UnitError(f"{name(dest)}: {exc}") from None
    if method == "competition-kinetics":
        missing = [name(f"tracer_{n}") for n in ("kon", "koff", "conc") if f"tracer_{n}" not in out]
        if missing:
            raise KrtError(f"competition-kinetics needs {', '.join(missing)} (the tracer's own kinetics)")
    if method == "ki-shift" and ("tracer_conc" in out) != ("tracer_kd" in out):
        raise KrtError(f"Cheng-Prusoff needs both {name('tracer_conc')} and {name('tracer_kd')}")
    if ("post_dilution_conc" in out) != ("kapp" in out):
        raise KrtError(f"the jump-dilution correction needs both {name('post_dilution_conc')} and {name('kapp')}")
    if method == "morrison" and "enzyme_conc" not in out:
        raise KrtError(f"morrison needs {name('enzyme_conc')} (the active enzyme concentration)")
    if ("substrate_conc" in out) != ("km" in out):
        raise KrtError(f"the competitive Ki needs both {name('substrate_conc')} and {name('km')}")
    return out


