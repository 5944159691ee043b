"""Closed forms used by the fits, and the curve functions the fitter evaluates.

Two layers, both pure numpy, SI floats (s, M, 1/s, 1/(M*s)):

* closed forms of published schemes (:func:`one_phase_decay`,
  :func:`jump_dilution_progress`, :func:`washout_recovery` ...), plain
  functions of ``x`` and named parameters that broadcast like
  :mod:`tracker.kinetics.equations`;
* *curve functions*, one per fitted model, with the fixed signature
  ``f(p, x, idx, curves, context) -> y``: ``p`` maps parameter names to values,
  ``idx[i]`` is the curve of point ``i`` and ``curves`` describes each curve
  (label, concentration, role).  Parameters that belong to one curve are named
  ``name[label]``.  One call evaluates every curve of a global fit at once,
  and a stored fit can redraw any of its curves from its parameters alone
  (see :data:`CURVE_FUNCTIONS`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .equations import association, logistic4


# --------------------------------------------------------------- closed forms
def one_phase_decay(t, koff, span, plateau=0.0):
    """One-phase decay to a plateau: Y = plateau + span*exp(-koff*t)."""
    return plateau + span * np.exp(-np.asarray(koff) * np.asarray(t, dtype=float))


def two_phase_decay(t, k_fast, k_slow, span_fast, span_slow, plateau=0.0):
    """Two-phase decay: Y = plateau + a*exp(-k_fast*t) + b*exp(-k_slow*t)."""
    t = np.asarray(t, dtype=float)
    return plateau + span_fast * np.exp(-k_fast * t) + span_slow * np.exp(-k_slow * t)


def one_phase_association(t, kobs, amplitude, y0=0.0):
    """One-phase rise: Y = y0 + amplitude*(1 - exp(-kobs*t)); kobs = kon*L + koff."""
    return y0 + amplitude * -np.expm1(-np.asarray(kobs) * np.asarray(t, dtype=float))


def jump_dilution_progress(t, vi, vs, kobs, p0=0.0):
    """Product after a jump dilution: P = p0 + vs*t + (vi - vs)*(1 - exp(-kobs*t))/kobs.

    ``vi`` is the rate just after dilution, ``vs`` the final steady-state rate
    (Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery, Wiley; from memory).
    """
    t = np.asarray(t, dtype=float)
    kobs = np.asarray(kobs, dtype=float)
    return p0 + vs * t + (vi - vs) * -np.expm1(-kobs * t) / kobs


def jump_dilution_kobs(koff, post_dilution_conc, kapp):
    """kobs of recovery for a one-step competitive inhibitor: koff*(1 + I_post/Kapp).

    Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery (from memory):
    the recovery rate equals koff only when the inhibitor left after dilution is
    far below Kapp.
    """
    return np.asarray(koff) * (1.0 + np.asarray(post_dilution_conc) / np.asarray(kapp))


def washout_recovery(t, rmax, fraction, koff):
    """Response recovering after washout: R = Rmax*(1 - f*exp(-koff*t)).

    ``f`` is the fraction of the response blocked at washout (occupancy with a
    linear occupancy-response relation).
    """
    return rmax * (1.0 - fraction * np.exp(-np.asarray(koff) * np.asarray(t, dtype=float)))


def motulsky_mahan_rates(tracer_conc, k1, k2, comp_conc, k3, k4):
    """The two observed rates (KF, KS) of Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9).

    KA = k1*L + k2, KB = k3*I + k4, S = sqrt((KA-KB)^2 + 4*k1*k3*L*I),
    KF = (KA+KB+S)/2, KS = (KA+KB-S)/2 (KS by Vieta's product to avoid
    cancellation when KS << KF).
    """
    L, k1, k2, I, k3, k4 = (np.asarray(a, dtype=float) for a in (tracer_conc, k1, k2, comp_conc, k3, k4))
    ka = k1 * L + k2
    kb = k3 * I + k4
    s = np.sqrt((ka - kb) ** 2 + 4.0 * k1 * k3 * L * I)
    kf = 0.5 * (ka + kb + s)
    ks = (k1 * L * k4 + k2 * k3 * I + k2 * k4) / kf
    return kf, ks


def agonist_response(x, baseline, emax, ec50, hill):
    """Rising logistic: Y = baseline + (Emax - baseline)*x^h/(x^h + EC50^h)."""
    return logistic4(x, emax, baseline, ec50, hill)


# ----------------------------------------------------------- curve functions
@dataclass(frozen=True)
class CurveInfo:
    """One curve of a fit: its label, the concentration that defines it, its role."""

    label: str
    conc: float = float("nan")
    role: str = "sample"  # 'sample' or 'control'
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "label": self.label,
            "conc": None if not np.isfinite(self.conc) else float(self.conc),
            "role": self.role,
            "extra": dict(self.extra),
        }

    @classmethod
    def from_dict(cls, d: dict) -> "CurveInfo":
        conc = d.get("conc")
        return cls(d["label"], float("nan") if conc is None else float(conc), d.get("role", "sample"), dict(d.get("extra") or {}))


def per_curve(p: dict, name: str, curves, idx) -> np.ndarray:
    """Per-point values of the per-curve parameter ``name[label]``."""
    return np.array([p[f"{name}[{c.label}]"] for c in curves], dtype=float)[idx]


def _conc(curves, idx) -> np.ndarray:
    return np.array([c.conc for c in curves], dtype=float)[idx]


def _is_control(curves, idx) -> np.ndarray:
    return np.array([c.role == "control" for c in curves], dtype=bool)[idx]


def cf_decay(p, x, idx, curves, context):
    return one_phase_decay(x, p["koff"], per_curve(p, "span", curves, idx), per_curve(p, "plateau", curves, idx))


def cf_decay2(p, x, idx, curves, context):
    return two_phase_decay(
        x, p["k_fast"], p["k_slow"], per_curve(p, "span_fast", curves, idx),
        per_curve(p, "span_slow", curves, idx), per_curve(p, "plateau", curves, idx),
    )


def cf_rise(p, x, idx, curves, context):
    return one_phase_association(x, p["kobs"], p["amplitude"], p["y0"])


def cf_association(p, x, idx, curves, context):
    return p["baseline"] + association(x, _conc(curves, idx), p["kon"], p["koff"], p["bmax"])


def motulsky_mahan_coefficients(tracer_conc, k1, k2, levels, k3, k4, bmax=1.0):
    """Motulsky-Mahan curve per competitor level as B = c0 + c1*exp(-kf*t) + c2*exp(-ks*t).

    Broadcasts over ``levels``, ``k3`` and ``k4`` (e.g. a grid of candidate rate
    constants against the levels of a plate); level 0 gives one-ligand
    association (Motulsky & Mahan 1984, Mol Pharmacol 25:1-9).
    """
    L = float(tracer_conc)
    levels, k3, k4 = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (levels, k3, k4)))
    kf, ks = motulsky_mahan_rates(L, k1, k2, levels, k3, k4)
    none = levels <= 0
    diff = np.where(none, 1.0, kf - ks)
    q = bmax * k1 * L / diff
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        c0 = q * k4 * diff / (kf * ks)
        c1 = q * (k4 - kf) / kf
        c2 = -q * (k4 - ks) / ks
    plateau = bmax * L / (L + k2 / k1)
    # no competitor: B = plateau*(1 - exp(-(k1*L + k2)*t))
    c0 = np.where(none, plateau, c0)
    c1 = np.where(none, -plateau, c1)
    c2 = np.where(none, 0.0, c2)
    kf = np.where(none, k1 * L + k2, kf)
    ks = np.where(none, 0.0, ks)
    return c0, c1, kf, c2, ks


def motulsky_mahan_levels(t, level_idx, tracer_conc, k1, k2, levels, k3, k4, bmax=1.0):
    """:func:`~tracker.kinetics.equations.motulsky_mahan` for points whose competitor
    concentration is ``levels[level_idx]``: the coefficients are worked out once per
    level, then two exponentials per point.  Same closed form (Motulsky & Mahan 1984),
    a fraction of the numpy calls, for global fits over many wells.
    """
    c0, c1, kf, c2, ks = motulsky_mahan_coefficients(tracer_conc, k1, k2, levels, k3, k4, bmax)
    t = np.asarray(t, dtype=float)
    i = np.asarray(level_idx)
    return c0[i] + c1[i] * np.exp(-kf[i] * t) + c2[i] * np.exp(-ks[i] * t)


def cf_competition(p, x, idx, curves, context):
    levels = np.array([c.conc for c in curves], dtype=float)
    b = motulsky_mahan_levels(
        x, idx, context["tracer_conc"], context["tracer_kon"], context["tracer_koff"],
        levels, p["kon"], p["koff"], p["bmax"],
    )
    return p["baseline"] + b


def cf_jump(p, x, idx, curves, context):
    ctrl = _is_control(curves, idx)
    vs = p["vs"]
    vs_inh = p.get("vs_inhibited", vs * context.get("vs_scale", 1.0))
    p0 = per_curve(p, "p0", curves, idx)
    vi = np.array([p.get(f"vi[{c.label}]", vs_inh) for c in curves], dtype=float)[idx]
    return np.where(ctrl, p0 + vs * np.asarray(x, dtype=float), jump_dilution_progress(x, vi, vs_inh, p["kobs"], p0))


def cf_washout(p, x, idx, curves, context):
    f = np.array([p.get(f"fraction[{c.label}]", 0.0) for c in curves], dtype=float)[idx]
    return washout_recovery(x, p["rmax"], f, p["koff"])


def cf_logistic(p, x, idx, curves, context):
    return logistic4(
        x, per_curve(p, "bottom", curves, idx), per_curve(p, "top", curves, idx),
        per_curve(p, "ic50", curves, idx), per_curve(p, "hill", curves, idx),
    )


def cf_insurmountable(p, x, idx, curves, context):
    frac = np.array([1.0 if c.role == "control" else p[f"fraction[{c.label}]"] for c in curves], dtype=float)[idx]
    emax = p["baseline"] + frac * p["span"]
    return agonist_response(x, p["baseline"], emax, per_curve(p, "ec50", curves, idx), per_curve(p, "hill", curves, idx))


CURVE_FUNCTIONS: dict[str, Callable] = {
    "one-phase-decay": cf_decay,
    "two-phase-decay": cf_decay2,
    "one-phase-association": cf_rise,
    "global-association": cf_association,
    "motulsky-mahan": cf_competition,
    "jump-dilution": cf_jump,
    "washout-recovery": cf_washout,
    "logistic4": cf_logistic,
    "agonist-emax-fraction": cf_insurmountable,
}
