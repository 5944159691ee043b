"""Curve functions: one per fitted model, evaluating every curve of a global fit at once.

Each has the fixed signature ``f(p, x, idx, curves, context) -> y``: ``p`` maps
parameter names to values, ``idx[i]`` is the curve of point ``i`` and
``curves`` describes each curve (label, concentration, role).  Parameters that
belong to one curve are named ``name[label]``.  A stored fit redraws any of its
curves from its parameters alone through :data:`CURVE_FUNCTIONS`.  The closed
forms themselves live in :mod:`tracker.kinetics.equations` (the one module of
them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import numpy.typing as npt

from .. import equations as eq

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]


@dataclass(frozen=True)
class CurveInfo:
    """One curve of a fit: its label, the concentration that defines it (M), its role."""

    label: str
    conc: float = math.nan
    role: str = "sample"  # 'sample' or 'control'
    extra: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))

    def __post_init__(self) -> None:
        if not isinstance(self.extra, MappingProxyType):
            object.__setattr__(self, "extra", MappingProxyType(dict(self.extra)))

    def __reduce__(self) -> tuple[Any, ...]:
        return (CurveInfo, (self.label, self.conc, self.role, dict(self.extra)))

    def to_dict(self) -> dict[str, Any]:
        return {
            "label": self.label,
            "conc": None if not np.isfinite(self.conc) else float(self.conc),
            "role": self.role,
            "extra": dict(self.extra),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CurveInfo:
        conc = d.get("conc")
        return cls(str(d["label"]), math.nan if conc is None else float(conc), str(d.get("role", "sample")),
                   dict(d.get("extra") or {}))


CurveFunction = Callable[[Mapping[str, float], FloatArray, IntArray, Sequence[CurveInfo], Mapping[str, float]],
                         FloatArray]


def per_curve(p: Mapping[str, float], name: str, curves: Sequence[CurveInfo], idx: IntArray) -> FloatArray:
    """Per-point values of the per-curve parameter ``name[label]``."""
    return np.array([p[f"{name}[{c.label}]"] for c in curves], dtype=np.float64)[idx]


def _conc(curves: Sequence[CurveInfo], idx: IntArray) -> FloatArray:
    return np.array([c.conc for c in curves], dtype=np.float64)[idx]


def _is_control(curves: Sequence[CurveInfo], idx: IntArray) -> npt.NDArray[np.bool_]:
    return np.array([c.role == "control" for c in curves], dtype=bool)[idx]


def cf_decay(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
             context: Mapping[str, float]) -> FloatArray:
    return eq.one_phase_decay(x, p["koff"], per_curve(p, "span", curves, idx), per_curve(p, "plateau", curves, idx))


def cf_decay2(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
              context: Mapping[str, float]) -> FloatArray:
    return eq.two_phase_decay(
        x, p["k_fast"], p["k_slow"], per_curve(p, "span_fast", curves, idx),
        per_curve(p, "span_slow", curves, idx), per_curve(p, "plateau", curves, idx),
    )


def cf_rise(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
            context: Mapping[str, float]) -> FloatArray:
    return eq.one_phase_association(x, p["kobs"], p["amplitude"], p["y0"])


def cf_association(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                   context: Mapping[str, float]) -> FloatArray:
    return p["baseline"] + eq.association(x, _conc(curves, idx), p["kon"], p["koff"], p["bmax"])


def cf_association_depletion(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                             context: Mapping[str, float]) -> FloatArray:
    """Signal = baseline + (Bmax/R0) * RL(t) with ligand depletion (exact Riccati solution)."""
    r0 = context["receptor_conc"]
    bound = eq.depletion_association(x, _conc(curves, idx), r0, p["kon"], p["koff"])
    return p["baseline"] + p["bmax"] * bound / r0


def cf_induced_fit(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                   context: Mapping[str, float]) -> FloatArray:
    """Two-step binding, first step in rapid equilibrium: one phase per curve from L/(L+K1) to L/(L+KD)."""
    L = _conc(curves, idx)
    kobs = eq.induced_fit_kobs(L, p["k_fwd"], p["k_rev"], p["k1"])
    kd = p["k1"] * p["k_rev"] / (p["k_fwd"] + p["k_rev"])
    f_eq, f_1 = L / (L + kd), L / (L + p["k1"])
    x = np.asarray(x, dtype=np.float64)
    return p["baseline"] + p["bmax"] * np.where(x > 0, f_eq - (f_eq - f_1) * np.exp(-kobs * x), 0.0)


def cf_rise_per_curve(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                      context: Mapping[str, float]) -> FloatArray:
    """Replicate rises: shared kobs, own amplitude and y0."""
    return eq.one_phase_association(x, p["kobs"], per_curve(p, "amplitude", curves, idx), per_curve(p, "y0", curves, idx))


def cf_rise_free_plateaus(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                          context: Mapping[str, float]) -> FloatArray:
    """Association with kobs = kon*L + koff but each curve's plateau free (a check on L/(L+KD))."""
    kobs = p["kon"] * _conc(curves, idx) + p["koff"]
    return p["baseline"] + eq.one_phase_association(x, kobs, per_curve(p, "amplitude", curves, idx))


def cf_competition(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                   context: Mapping[str, float]) -> FloatArray:
    levels = np.array([c.conc for c in curves], dtype=np.float64)
    b = eq.motulsky_mahan_levels(
        x, idx, context["tracer_conc"], context["tracer_kon"], context["tracer_koff"],
        levels, p["kon"], p["koff"], p["bmax"],
    )
    return p["baseline"] + b


def competition_with_depletion(t: FloatArray, idx: IntArray, levels: FloatArray, tracer_conc: float,
                               receptor_conc: float, k1: float, k2: float, k3: float, k4: float) -> FloatArray:
    """Tracer bound RL(t) (M) of R + L <-> RL (k1, k2), R + I <-> RI (k3, k4), both added at t = 0, with
    ligand depletion: free L = L0 - RL, free I = I0 - RI, free R = R0 - RL - RI.

    No closed form exists with depletion, so the scheme is integrated (scipy solve_ivp, LSODA with the
    analytic Jacobian, rtol 1e-9), all competitor levels in one call.  With R0 << L0 it is the
    Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9) closed form; with I0 = 0 it is
    :func:`tracker.kinetics.equations.depletion_association`.
    """
    from scipy.integrate import solve_ivp

    t = np.asarray(t, dtype=np.float64)
    lv = np.asarray(levels, dtype=np.float64)
    n = lv.size
    L0, R0 = float(tracer_conc), float(receptor_conc)

    def rhs(_: float, s: FloatArray) -> FloatArray:
        rl, ri = s[:n], s[n:]
        r = R0 - rl - ri
        return np.concatenate([k1 * r * (L0 - rl) - k2 * rl, k3 * r * (lv - ri) - k4 * ri])

    def jac(_: float, s: FloatArray) -> FloatArray:
        rl, ri = s[:n], s[n:]
        r = R0 - rl - ri
        J = np.zeros((2 * n, 2 * n))
        d = np.arange(n)
        J[d, d] = -k1 * (L0 - rl) - k1 * r - k2
        J[d, n + d] = -k1 * (L0 - rl)
        J[n + d, d] = -k3 * (lv - ri)
        J[n + d, n + d] = -k3 * (lv - ri) - k3 * r - k4
        return J

    tu, inv = np.unique(t, return_inverse=True)
    out = np.zeros((n, tu.size))
    pos = tu > 0
    if np.any(pos):
        sol = solve_ivp(rhs, (0.0, float(tu[pos][-1])), np.zeros(2 * n), method="LSODA", t_eval=tu[pos], jac=jac,
                        rtol=1e-9, atol=1e-12 * min(R0, L0))
        if not sol.success or sol.y.shape[1] != int(pos.sum()):
            return np.full(t.shape, np.nan)
        out[:, pos] = sol.y[:n]
    return np.asarray(out[np.asarray(idx, dtype=np.intp), inv.ravel()], dtype=np.float64)


def cf_competition_depletion(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                             context: Mapping[str, float]) -> FloatArray:
    levels = np.array([c.conc for c in curves], dtype=np.float64)
    r0 = context["receptor_conc"]
    rl = competition_with_depletion(x, idx, levels, context["tracer_conc"], r0, context["tracer_kon"],
                                    context["tracer_koff"], p["kon"], p["koff"])
    return p["baseline"] + p["bmax"] * rl / r0


def cf_jump(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
            context: Mapping[str, float]) -> FloatArray:
    ctrl = _is_control(curves, idx)
    vs = p["vs"]
    vs_inh = p.get("vs_inhibited", vs * context.get("vs_scale", 1.0))
    p0 = per_curve(p, "p0", curves, idx)
    vi = np.array([p.get(f"vi[{c.label}]", vs_inh) for c in curves], dtype=np.float64)[idx]
    x = np.asarray(x, dtype=np.float64)
    return np.where(ctrl, p0 + vs * x, eq.jump_dilution_progress(x, vi, vs_inh, p["kobs"], p0))


def cf_washout(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
               context: Mapping[str, float]) -> FloatArray:
    f = np.array([p.get(f"fraction[{c.label}]", 0.0) for c in curves], dtype=np.float64)[idx]
    return eq.washout_recovery(x, p["rmax"], f, p["koff"])


def cf_logistic(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                context: Mapping[str, float]) -> FloatArray:
    return eq.logistic4(
        x, per_curve(p, "bottom", curves, idx), per_curve(p, "top", curves, idx),
        per_curve(p, "ic50", curves, idx), per_curve(p, "hill", curves, idx),
    )


def cf_insurmountable(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                      context: Mapping[str, float]) -> FloatArray:
    frac = np.array([1.0 if c.role == "control" else p[f"fraction[{c.label}]"] for c in curves],
                    dtype=np.float64)[idx]
    emax = p["baseline"] + frac * p["span"]
    return eq.agonist_response(x, p["baseline"], emax, per_curve(p, "ec50", curves, idx),
                               per_curve(p, "hill", curves, idx))


def cf_morrison(p: Mapping[str, float], x: FloatArray, idx: IntArray, curves: Sequence[CurveInfo],
                context: Mapping[str, float]) -> FloatArray:
    """Activity = bottom + (top - bottom) * v/v0 (Morrison 1969)."""
    frac = eq.morrison_fraction(x, context["enzyme_conc"], p["kapp"])
    return p["bottom"] + (p["top"] - p["bottom"]) * frac


# a registry: a benchmark or an extension may add a curve function under a new kind
CURVE_FUNCTIONS: dict[str, CurveFunction] = {
    "one-phase-decay": cf_decay,
    "two-phase-decay": cf_decay2,
    "one-phase-association": cf_rise,
    "global-association": cf_association,
    "global-association-depletion": cf_association_depletion,
    "induced-fit-association": cf_induced_fit,
    "rise-per-curve": cf_rise_per_curve,
    "rise-free-plateaus": cf_rise_free_plateaus,
    "motulsky-mahan": cf_competition,
    "motulsky-mahan-depletion": cf_competition_depletion,
    "jump-dilution": cf_jump,
    "washout-recovery": cf_washout,
    "logistic4": cf_logistic,
    "agonist-emax-fraction": cf_insurmountable,
    "morrison": cf_morrison,
}
