"""Closed forms of the published binding equations, as plain numpy functions.

SI floats in, numbers out: concentrations in M, times in s, kon in 1/(M*s),
koff in 1/s.  Every function broadcasts over its arguments, so one call can
evaluate thousands of compounds (or a grid of concentrations x times).
"""

from __future__ import annotations

import numpy as np

LN2 = float(np.log(2.0))


def association(t, conc, kon, koff, bmax=1.0):
    """Pseudo-first-order association (no depletion):
    B(t) = Bmax * L/(L+KD) * (1 - exp(-(kon*L + koff)*t)).
    """
    t, conc, kon, koff = np.broadcast_arrays(*map(np.asarray, (t, conc, kon, koff)))
    kd = koff / kon
    kobs = kon * conc + koff
    return bmax * conc / (conc + kd) * -np.expm1(-kobs * t)


def dissociation(t, koff, b0=1.0, nsb=0.0):
    """One-phase dissociation: B(t) = B0*exp(-koff*t) + NSB."""
    return b0 * np.exp(-np.asarray(koff) * np.asarray(t)) + nsb


def motulsky_mahan(t, tracer_conc, k1, k2, comp_conc, k3, k4, bmax=1.0):
    """Specific tracer binding when tracer and competitor are added together at t=0.

    Motulsky & Mahan 1984, Mol Pharmacol 25:1-9: tracer (k1, k2, concentration L)
    and unlabelled competitor (k3, k4, concentration I) compete for one site, no
    depletion.  Where I == 0 the closed form's denominator (KF-KS) can vanish, so
    that case is evaluated as one-ligand association.
    """
    t, L, k1, k2, I, k3, k4 = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (t, tracer_conc, k1, k2, comp_conc, k3, k4))
    )
    ka = k1 * L + k2
    kb = k3 * I + k4
    s = np.sqrt((ka - kb) ** 2 + 4.0 * k1 * k3 * L * I)
    kf = 0.5 * (ka + kb + s)
    ks = 0.5 * (ka + kb - s)
    # KS by Vieta (KF*KS = k1*L*k4 + k2*k3*I + k2*k4) avoids cancellation when KS << KF
    prod = k1 * L * k4 + k2 * k3 * I + k2 * k4
    ks = np.where(kf > 0, prod / np.where(kf > 0, kf, 1.0), ks)
    no_comp = I <= 0
    diff = np.where(no_comp, 1.0, kf - ks)
    q = bmax * k1 * L / diff
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        b = q * (
            k4 * diff / (kf * ks)
            + (k4 - kf) / kf * np.exp(-kf * t)
            - (k4 - ks) / ks * np.exp(-ks * t)
        )
    single = association(t, L, k1, k2, bmax)
    return np.where(no_comp, single, b)


def motulsky_mahan_equilibrium(tracer_conc, k1, k2, comp_conc, k3, k4, bmax=1.0):
    """t -> infinity of :func:`motulsky_mahan` (Gaddum): Bmax*(L/Kd)/(1 + L/Kd + I/Ki)."""
    kd = np.asarray(k2) / np.asarray(k1)
    ki = np.asarray(k4) / np.asarray(k3)
    return bmax * (tracer_conc / kd) / (1.0 + tracer_conc / kd + comp_conc / ki)


def cheng_prusoff_ki(ic50, tracer_conc, tracer_kd):
    """Cheng & Prusoff 1973, Biochem Pharmacol 22:3099-3108: Ki = IC50/(1 + L/Kd)."""
    return np.asarray(ic50) / (1.0 + np.asarray(tracer_conc) / np.asarray(tracer_kd))


def cheng_prusoff_ic50(ki, tracer_conc, tracer_kd):
    """Inverse of :func:`cheng_prusoff_ki`: IC50 = Ki*(1 + L/Kd)."""
    return np.asarray(ki) * (1.0 + np.asarray(tracer_conc) / np.asarray(tracer_kd))


def logistic4(x, bottom, top, ic50, hill):
    """Four-parameter logistic: Y = Bottom + (Top-Bottom)/(1 + (X/IC50)^nH)."""
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", over="ignore"):
        return bottom + (top - bottom) / (1.0 + (x / ic50) ** hill)


# ----------------------------------------------------------------------------
# Added for the simulation layer (assay.py, engagement.py).  Existing
# signatures above are unchanged.
# ----------------------------------------------------------------------------
def rate_constants(kd=None, kon=None, koff=None, residence_time=None, *, rtol=1e-3):
    """Complete ``(kd, kon, koff)`` from ANY TWO independent inputs.

    KD = koff/kon and RT = 1/koff (Copeland, Pompliano & Meek 2006, Nat Rev
    Drug Discov 5:730-739).  ``koff`` and ``residence_time`` carry the same
    information, so that pair alone is insufficient.  More than two inputs are
    accepted only when they agree within ``rtol`` (relative).  Arrays broadcast.

    Raises :class:`tracker.errors.InputError` (one line) when the combination is
    insufficient or inconsistent, or a value is not positive and finite.
    """
    from ..errors import InputError

    given = {k: v for k, v in (("kd", kd), ("kon", kon), ("koff", koff), ("residence_time", residence_time)) if v is not None}
    for name, v in given.items():
        a = np.asarray(v, dtype=float)
        if not np.all(np.isfinite(a)) or np.any(a <= 0):
            raise InputError(f"{name.replace('_', ' ')} must be positive and finite")
    vals = {k: np.asarray(v, dtype=float) for k, v in given.items()}
    koff_sources = []
    if "koff" in vals:
        koff_sources.append(vals["koff"])
    if "residence_time" in vals:
        koff_sources.append(1.0 / vals["residence_time"])
    names = set(vals)
    if len(names) < 2 or names == {"koff", "residence_time"}:
        raise InputError(
            "give any two of KD, kon, koff, residence time (koff and residence time count as one)"
        )
    if koff_sources:
        k_off = koff_sources[0]
        if "kon" in vals:
            k_on = vals["kon"]
        else:
            k_on = k_off / vals["kd"]
    else:
        k_on = vals["kon"]
        k_off = vals["kd"] * k_on
    k_d = k_off / k_on
    # every given value must agree with the completed set
    checks = {"kd": k_d, "kon": k_on, "koff": k_off, "residence_time": 1.0 / k_off}
    for name, v in vals.items():
        if np.any(np.abs(v - checks[name]) > rtol * np.abs(checks[name])):
            raise InputError(
                "inconsistent kinetic constants: KD must equal koff/kon and residence time 1/koff "
                f"(check {name.replace('_', ' ')})"
            )
    return k_d, k_on, k_off


def competitive_binding(t, tracer_conc, k1, k2, comp_conc, k3, k4, rl0=0.0, ri0=0.0):
    """Fractional occupancy by tracer and competitor, ``(RL(t), RI(t))``, from any start.

    The two-ligand scheme of Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9):
    R+L <-> RL (k1, k2), R+I <-> RI (k3, k4), free concentrations constant (no
    depletion), total receptor 1.  The ODE x' = A x + b with x = (RL, RI),
    A = [[-(k1 L + k2), -k1 L], [-k3 I, -(k3 I + k4)]], b = (k1 L, k3 I) is
    linear, so it is solved exactly:

        x(t) = x_eq + exp(A t) (x0 - x_eq)

    with the 2x2 matrix exponential written through the eigenvalues -KF, -KS
    (the KF, KS of Motulsky & Mahan) as
    exp(A t) = c(t) 1 + phi(t) (A - s 1), c = (e^-KF t + e^-KS t)/2,
    phi = (e^-KS t - e^-KF t)/(KF - KS), s = -(KF + KS)/2.  ``phi`` is evaluated
    with expm1 (its KF -> KS limit is t e^-KS t) and the x0 = 0 part as
    phi b + (1 - c + s phi) x_eq, so small t loses no precision.  With
    ``rl0 = ri0 = 0`` this equals :func:`motulsky_mahan` (Bmax = 1).
    A pre-incubation of competitor with receptor is ``ri0 > 0``.
    ``k4 = 0`` (an irreversible competitor) is allowed when ``comp_conc > 0``.
    Everything broadcasts.
    """
    t, L, k1, k2, I, k3, k4, rl0, ri0 = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (t, tracer_conc, k1, k2, comp_conc, k3, k4, rl0, ri0))
    )
    ka = k1 * L + k2
    kb = k3 * I + k4
    s_root = np.sqrt((ka - kb) ** 2 + 4.0 * k1 * k3 * L * I)
    kf = 0.5 * (ka + kb + s_root)
    prod = k1 * L * k4 + k2 * k3 * I + k2 * k4  # = KF*KS (Vieta)
    with np.errstate(divide="ignore", invalid="ignore"):
        ks = np.where(kf > 0, prod / np.where(kf > 0, kf, 1.0), 0.0)
        diff = kf - ks
        # equilibrium (Gaddum), written so that k4 = 0 needs no division by Ki
        denom = prod
        ok = denom > 0
        rl_eq = np.where(ok, k1 * L * k4 / np.where(ok, denom, 1.0), L * k1 / np.where(ka > 0, ka, 1.0))
        ri_eq = np.where(ok, k2 * k3 * I / np.where(ok, denom, 1.0), 0.0)
        e_f = -np.expm1(-kf * t)  # 1 - e^-KF t
        e_s = -np.expm1(-ks * t)
        x = diff * t
        small = x < 1e-300
        phi = np.where(small, t * np.exp(-ks * t), np.exp(-ks * t) * (-np.expm1(-x)) / np.where(small, 1.0, diff))
        one_minus_c = 0.5 * (e_f + e_s)
        c = 1.0 - one_minus_c
        s_half = -0.5 * (ka + kb)
        coef = one_minus_c + s_half * phi
        rl = phi * k1 * L + coef * rl_eq
        ri = phi * k3 * I + coef * ri_eq
        # + exp(A t) x0
        rl = rl + c * rl0 + phi * ((-ka - s_half) * rl0 - k1 * L * ri0)
        ri = ri + c * ri0 + phi * (-k3 * I * rl0 + (-kb - s_half) * ri0)
    return rl, ri
