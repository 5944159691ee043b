"""Closed forms of the published binding equations: the one module of them.

SI floats in, numbers out: concentrations in M, times in s, kon in 1/(M*s),
koff in 1/s.  Every function broadcasts over its arguments, so one call can
evaluate thousands of compounds (or a grid of concentrations x times).  The
fits (:mod:`tracker.kinetics.fitting`) evaluate these same functions; there is
no second copy.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = [
    "LN2",
    "agonist_response",
    "association",
    "cheng_prusoff_ic50",
    "cheng_prusoff_ki",
    "competitive_binding",
    "depletion_association",
    "dissociation",
    "induced_fit_kobs",
    "jump_dilution_kobs",
    "jump_dilution_progress",
    "logistic4",
    "morrison_fraction",
    "motulsky_mahan",
    "motulsky_mahan_coefficients",
    "motulsky_mahan_equilibrium",
    "motulsky_mahan_levels",
    "motulsky_mahan_rates",
    "munson_rodbard_ki",
    "one_phase_association",
    "one_phase_decay",
    "rate_constants",
    "tracer_bound_free_ratio",
    "two_phase_decay",
    "washout_recovery",
]

FloatArray = npt.NDArray[np.float64]
ArrayLike = npt.ArrayLike

LN2 = float(np.log(2.0))


def _f(a: ArrayLike) -> FloatArray:
    return np.asarray(a, dtype=np.float64)


# ------------------------------------------------------------------ single ligand
def one_phase_decay(t: ArrayLike, koff: ArrayLike, span: ArrayLike, plateau: ArrayLike = 0.0) -> FloatArray:
    """One-phase decay to a plateau: Y = plateau + span*exp(-koff*t) (t in s, koff in 1/s)."""
    return _f(plateau) + _f(span) * np.exp(-_f(koff) * _f(t))


def dissociation(t: ArrayLike, koff: ArrayLike, b0: ArrayLike = 1.0, nsb: ArrayLike = 0.0) -> FloatArray:
    """One-phase dissociation: B(t) = B0*exp(-koff*t) + NSB (the same curve as :func:`one_phase_decay`)."""
    return one_phase_decay(t, koff, b0, nsb)


def two_phase_decay(t: ArrayLike, k_fast: ArrayLike, k_slow: ArrayLike, span_fast: ArrayLike,
                    span_slow: ArrayLike, plateau: ArrayLike = 0.0) -> FloatArray:
    """Two-phase decay: Y = plateau + a*exp(-k_fast*t) + b*exp(-k_slow*t)."""
    t = _f(t)
    return _f(plateau) + _f(span_fast) * np.exp(-_f(k_fast) * t) + _f(span_slow) * np.exp(-_f(k_slow) * t)


def one_phase_association(t: ArrayLike, kobs: ArrayLike, amplitude: ArrayLike, y0: ArrayLike = 0.0) -> FloatArray:
    """One-phase rise: Y = y0 + amplitude*(1 - exp(-kobs*t)); kobs = kon*L + koff."""
    return _f(y0) + _f(amplitude) * -np.expm1(-_f(kobs) * _f(t))


def association(t: ArrayLike, conc: ArrayLike, kon: ArrayLike, koff: ArrayLike, bmax: ArrayLike = 1.0) -> FloatArray:
    """Pseudo-first-order association (no depletion):
    B(t) = Bmax * L/(L+KD) * (1 - exp(-(kon*L + koff)*t)), KD = koff/kon.
    """
    t_, L, kon_, koff_ = np.broadcast_arrays(_f(t), _f(conc), _f(kon), _f(koff))
    kd = koff_ / kon_
    return one_phase_association(t_, kon_ * L + koff_, _f(bmax) * L / (L + kd))


def depletion_association(t: ArrayLike, ligand_total: ArrayLike, receptor_total: ArrayLike, kon: ArrayLike,
                          koff: ArrayLike) -> FloatArray:
    """Bound complex RL(t) (M) of R + L <-> RL with ligand depletion, from RL(0) = 0.

    dB/dt = kon*(R0 - B)*(L0 - B) - koff*B is a Riccati equation with constant
    coefficients; with the two roots of kon*B^2 - (kon*(R0 + L0) + koff)*B +
    kon*R0*L0 = 0, B_minus <= B_plus, and kobs = kon*(B_plus - B_minus) (the
    square root of the discriminant), its exact solution is

        B(t) = B_minus*(1 - exp(-kobs*t)) / (1 - (B_minus/B_plus)*exp(-kobs*t))

    (the standard second-order binding with depletion: e.g. Motulsky & Mahan
    1984 discuss the pseudo-first-order limit; the Riccati solution is textbook
    (from memory) and is checked against scipy solve_ivp in the tests).  When
    R0 << L0 it reduces to :func:`association` with Bmax = R0.
    """
    t_, L0, R0, kon_, koff_ = np.broadcast_arrays(_f(t), _f(ligand_total), _f(receptor_total), _f(kon), _f(koff))
    a = kon_ * (R0 + L0) + koff_
    disc = np.sqrt(np.maximum(a * a - 4.0 * kon_ * kon_ * R0 * L0, 0.0))
    b_plus = (a + disc) / (2.0 * kon_)
    # B_minus by Vieta (B_minus*B_plus = R0*L0) avoids cancellation when depletion is slight
    with np.errstate(divide="ignore", invalid="ignore"):
        b_minus = np.where(b_plus > 0, R0 * L0 / np.where(b_plus > 0, b_plus, 1.0), 0.0)
        kobs = disc
        e = np.exp(-kobs * t_)
        ratio = np.where(b_plus > 0, b_minus / np.where(b_plus > 0, b_plus, 1.0), 0.0)
        out = b_minus * -np.expm1(-kobs * t_) / (1.0 - ratio * e)
    return np.asarray(np.where(np.isfinite(out), out, b_minus), dtype=np.float64)


def induced_fit_kobs(conc: ArrayLike, k_fwd: ArrayLike, k_rev: ArrayLike, k1: ArrayLike) -> FloatArray:
    """Observed rate of a two-step (induced-fit) binding R + L <-> RL <-> RL*.

    When the first (encounter) step equilibrates fast with dissociation
    constant K1, the slow isomerisation gives the hyperbolic
    kobs = k_rev + k_fwd*L/(L + K1), a kobs plot that bends down and levels at
    k_fwd + k_rev (Vauquelin 2016, Br J Pharmacol 173:1268-1285; the rapid
    pre-equilibrium form, from memory).  Overall KD = K1*k_rev/(k_fwd + k_rev).
    """
    L = _f(conc)
    return _f(k_rev) + _f(k_fwd) * L / (L + _f(k1))


# ------------------------------------------------------------------ Motulsky & Mahan
def motulsky_mahan_rates(tracer_conc: ArrayLike, k1: ArrayLike, k2: ArrayLike, comp_conc: ArrayLike,
                         k3: ArrayLike, k4: ArrayLike) -> tuple[FloatArray, FloatArray]:
    """The two observed rates (KF, KS) of Motulsky & Mahan 1984 (Mol Pharmacol 25:1-9).

    KA = k1*L + k2, KB = k3*I + k4, S = sqrt((KA-KB)^2 + 4*k1*k3*L*I),
    KF = (KA+KB+S)/2, KS = (KA+KB-S)/2 (KS by Vieta's product,
    KF*KS = k1*L*k4 + k2*k3*I + k2*k4, to avoid cancellation when KS << KF).
    """
    L, k1_, k2_, I, k3_, k4_ = (_f(a) for a in (tracer_conc, k1, k2, comp_conc, k3, k4))
    ka = k1_ * L + k2_
    kb = k3_ * I + k4_
    s = np.sqrt((ka - kb) ** 2 + 4.0 * k1_ * k3_ * L * I)
    kf = 0.5 * (ka + kb + s)
    with np.errstate(divide="ignore", invalid="ignore"):
        ks = np.where(kf > 0, (k1_ * L * k4_ + k2_ * k3_ * I + k2_ * k4_) / np.where(kf > 0, kf, 1.0), 0.5 * (ka + kb - s))
    return kf, np.asarray(ks, dtype=np.float64)


def motulsky_mahan_coefficients(
    tracer_conc: ArrayLike, k1: ArrayLike, k2: ArrayLike, comp_conc: ArrayLike, k3: ArrayLike, k4: ArrayLike,
    bmax: ArrayLike = 1.0,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray]:
    """Motulsky & Mahan's closed form written as B(t) = c0 + c1*exp(-KF*t) + c2*exp(-KS*t).

    Motulsky & Mahan 1984, Mol Pharmacol 25:1-9: tracer (k1, k2, concentration L)
    and unlabelled competitor (k3, k4, concentration I) added together at t = 0,
    one site, no depletion.  With Q = Bmax*k1*L/(KF-KS):
    c0 = Q*k4*(KF-KS)/(KF*KS), c1 = Q*(k4-KF)/KF, c2 = -Q*(k4-KS)/KS.  Where
    I == 0 the denominator KF-KS can vanish, so that case is one-ligand
    association (c0 = -c1 = Bmax*L/(L+KD), KF = k1*L + k2, c2 = 0).
    Returns ``(c0, c1, KF, c2, KS)``, broadcast over all arguments.
    """
    L, k1_, k2_, I, k3_, k4_, bm = np.broadcast_arrays(*(_f(a) for a in (tracer_conc, k1, k2, comp_conc, k3, k4, bmax)))
    kf, ks = motulsky_mahan_rates(L, k1_, k2_, I, k3_, k4_)
    none = I <= 0
    diff = np.where(none, 1.0, kf - ks)
    q = bm * k1_ * L / diff
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        c0 = q * k4_ * diff / (kf * ks)
        c1 = q * (k4_ - kf) / kf
        c2 = -q * (k4_ - ks) / ks
    plateau = bm * L / (L + k2_ / k1_)
    c0 = np.where(none, plateau, c0)
    c1 = np.where(none, -plateau, c1)
    c2 = np.where(none, 0.0, c2)
    kf = np.where(none, k1_ * L + k2_, kf)
    ks = np.where(none, 0.0, ks)
    return c0, c1, kf, c2, ks


def motulsky_mahan(t: ArrayLike, tracer_conc: ArrayLike, k1: ArrayLike, k2: ArrayLike, comp_conc: ArrayLike,
                   k3: ArrayLike, k4: ArrayLike, bmax: ArrayLike = 1.0) -> FloatArray:
    """Specific tracer binding when tracer and competitor are added together at t=0.

    Motulsky & Mahan 1984, Mol Pharmacol 25:1-9, through
    :func:`motulsky_mahan_coefficients`; I == 0 is one-ligand association.
    """
    c0, c1, kf, c2, ks = motulsky_mahan_coefficients(tracer_conc, k1, k2, comp_conc, k3, k4, bmax)
    t_ = _f(t)
    with np.errstate(over="ignore", invalid="ignore"):
        return np.asarray(c0 + c1 * np.exp(-kf * t_) + c2 * np.exp(-ks * t_), dtype=np.float64)


def motulsky_mahan_levels(t: ArrayLike, level_idx: ArrayLike, tracer_conc: float, k1: float, k2: float,
                          levels: ArrayLike, k3: ArrayLike, k4: ArrayLike, bmax: ArrayLike = 1.0) -> FloatArray:
    """:func:`motulsky_mahan` for points whose competitor concentration is ``levels[level_idx]``.

    The coefficients are worked out once per level, then two exponentials per
    point: the same closed form, a fraction of the numpy calls, for global fits
    over many wells.
    """
    c0, c1, kf, c2, ks = motulsky_mahan_coefficients(tracer_conc, k1, k2, levels, k3, k4, bmax)
    t_ = _f(t)
    i = np.asarray(level_idx, dtype=np.intp)
    return np.asarray(c0[i] + c1[i] * np.exp(-kf[i] * t_) + c2[i] * np.exp(-ks[i] * t_), dtype=np.float64)


def motulsky_mahan_equilibrium(tracer_conc: ArrayLike, k1: ArrayLike, k2: ArrayLike, comp_conc: ArrayLike,
                               k3: ArrayLike, k4: ArrayLike, bmax: ArrayLike = 1.0) -> FloatArray:
    """t -> infinity of :func:`motulsky_mahan` (Gaddum): Bmax*(L/Kd)/(1 + L/Kd + I/Ki)."""
    kd = _f(k2) / _f(k1)
    ki = _f(k4) / _f(k3)
    L = _f(tracer_conc)
    return _f(bmax) * (L / kd) / (1.0 + L / kd + _f(comp_conc) / ki)


# ------------------------------------------------------------------ equilibrium potency
def cheng_prusoff_ki(ic50: ArrayLike, tracer_conc: ArrayLike, tracer_kd: ArrayLike) -> FloatArray:
    """Cheng & Prusoff 1973, Biochem Pharmacol 22:3099-3108: Ki = IC50/(1 + L/Kd)."""
    return _f(ic50) / (1.0 + _f(tracer_conc) / _f(tracer_kd))


def cheng_prusoff_ic50(ki: ArrayLike, tracer_conc: ArrayLike, tracer_kd: ArrayLike) -> FloatArray:
    """Inverse of :func:`cheng_prusoff_ki`: IC50 = Ki*(1 + L/Kd)."""
    return _f(ki) * (1.0 + _f(tracer_conc) / _f(tracer_kd))


def tracer_bound_free_ratio(receptor_conc: ArrayLike, tracer_conc: ArrayLike, tracer_kd: ArrayLike) -> FloatArray:
    """Bound/free tracer ratio y0 at equilibrium without competitor, with depletion of both.

    Total receptor R and tracer L, one site: bound B solves
    B**2 - (R + L + Kd) B + R L = 0 (the smaller root); y0 = B/(L - B).
    """
    r, lt, kd = _f(receptor_conc), _f(tracer_conc), _f(tracer_kd)
    s = r + lt + kd
    b = 2.0 * r * lt / (s + np.sqrt(s * s - 4.0 * r * lt))  # the smaller root, without cancellation
    return b / (lt - b)


def munson_rodbard_ki(ic50: ArrayLike, tracer_conc: ArrayLike, tracer_kd: ArrayLike, bound_free_ratio: ArrayLike) -> FloatArray:
    """Depletion-corrected Cheng-Prusoff (Munson & Rodbard 1988, J Recept Res 8:533-546).

    Ki = IC50 / (1 + L (y0 + 2) / (2 Kd (y0 + 1)) + y0) - Kd y0 / (y0 + 2), with
    IC50 the total competitor concentration at half-inhibition, L the total tracer
    concentration added and y0 the bound/free tracer ratio without competitor
    (:func:`tracer_bound_free_ratio`).  y0 -> 0 gives :func:`cheng_prusoff_ki`.
    """
    i50, lt, kd, y0 = _f(ic50), _f(tracer_conc), _f(tracer_kd), _f(bound_free_ratio)
    out: FloatArray = i50 / (1.0 + lt * (y0 + 2.0) / (2.0 * kd * (y0 + 1.0)) + y0) - kd * y0 / (y0 + 2.0)
    return out


def logistic4(x: ArrayLike, bottom: ArrayLike, top: ArrayLike, ic50: ArrayLike, hill: ArrayLike) -> FloatArray:
    """Four-parameter logistic: Y = Bottom + (Top-Bottom)/(1 + (X/IC50)^nH)."""
    x_ = _f(x)
    with np.errstate(divide="ignore", over="ignore"):
        return _f(bottom) + (_f(top) - _f(bottom)) / (1.0 + (x_ / _f(ic50)) ** _f(hill))


def agonist_response(x: ArrayLike, baseline: ArrayLike, emax: ArrayLike, ec50: ArrayLike, hill: ArrayLike) -> FloatArray:
    """Rising logistic: Y = baseline + (Emax - baseline)*x^h/(x^h + EC50^h)."""
    return logistic4(x, emax, baseline, ec50, hill)


def morrison_fraction(inhibitor_conc: ArrayLike, enzyme_conc: ArrayLike, kapp: ArrayLike) -> FloatArray:
    """Fractional activity v/v0 of a tight-binding inhibitor (Morrison equation).

    v/v0 = 1 - [(E + I + Kapp) - sqrt((E + I + Kapp)^2 - 4*E*I)]/(2*E), with E
    the active enzyme and I the total inhibitor concentration (M) and Kapp the
    apparent inhibition constant (Morrison 1969, Biochim Biophys Acta
    185:269-286; volume and pages from memory).  Its IC50 is Kapp + E/2
    (Copeland et al. 1995, Bioorg Med Chem Lett 5:1947-1952).  The bound
    enzyme is taken as the smaller root, written through Vieta's product
    (EI = E*I/EI_plus) so that E -> 0 stays accurate (it tends to the
    hyperbola 1/(1 + I/Kapp)).
    """
    I, E, K = np.broadcast_arrays(_f(inhibitor_conc), _f(enzyme_conc), _f(kapp))
    s = E + I + K
    root = np.sqrt(np.maximum(s * s - 4.0 * E * I, 0.0))
    big = 0.5 * (s + root)  # the larger root; the bound complex is E*I/big (Vieta)
    with np.errstate(divide="ignore", invalid="ignore"):
        ei = np.where(big > 0, E * I / np.where(big > 0, big, 1.0), 0.0)
        frac = np.where(E > 0, 1.0 - ei / np.where(E > 0, E, 1.0), 1.0 / (1.0 + I / K))
    return np.asarray(frac, dtype=np.float64)


# ------------------------------------------------------------------ recovery experiments
def jump_dilution_progress(t: ArrayLike, vi: ArrayLike, vs: ArrayLike, kobs: ArrayLike, p0: ArrayLike = 0.0) -> FloatArray:
    """Product after a jump dilution: P = p0 + vs*t + (vi - vs)*(1 - exp(-kobs*t))/kobs.

    ``vi`` is the rate just after dilution, ``vs`` the final steady-state rate
    (Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery, Wiley; from memory).
    """
    t_ = _f(t)
    k = _f(kobs)
    return _f(p0) + _f(vs) * t_ + (_f(vi) - _f(vs)) * -np.expm1(-k * t_) / k


def jump_dilution_kobs(koff: ArrayLike, post_dilution_conc: ArrayLike, kapp: ArrayLike) -> FloatArray:
    """kobs of recovery for a one-step competitive inhibitor: koff*(1 + I_post/Kapp).

    Copeland, Evaluation of Enzyme Inhibitors in Drug Discovery (from memory):
    the recovery rate equals koff only when the inhibitor left after dilution is
    far below Kapp.
    """
    return _f(koff) * (1.0 + _f(post_dilution_conc) / _f(kapp))


def washout_recovery(t: ArrayLike, rmax: ArrayLike, fraction: ArrayLike, koff: ArrayLike) -> FloatArray:
    """Response recovering after washout: R = Rmax*(1 - f*exp(-koff*t)).

    ``f`` is the fraction of the response blocked at washout (occupancy with a
    linear occupancy-response relation).
    """
    return _f(rmax) * (1.0 - _f(fraction) * np.exp(-_f(koff) * _f(t)))


# ----------------------------------------------------------------------------
# Added for the simulation layer (assay.py, engagement.py).  Existing
# signatures above are unchanged.
# ----------------------------------------------------------------------------
def rate_constants(kd: ArrayLike | None = None, kon: ArrayLike | None = None, koff: ArrayLike | None = None,
                   residence_time: ArrayLike | None = None, *, rtol: float = 1e-3
                   ) -> tuple[FloatArray, FloatArray, FloatArray]:
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


def competitive_binding(t: ArrayLike, tracer_conc: ArrayLike, k1: ArrayLike, k2: ArrayLike, comp_conc: ArrayLike,
                        k3: ArrayLike, k4: ArrayLike, rl0: ArrayLike = 0.0, ri0: ArrayLike = 0.0
                        ) -> tuple[FloatArray, FloatArray]:
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
