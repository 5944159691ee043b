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
