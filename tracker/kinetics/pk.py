"""Free-drug concentration-time profiles for the engagement simulation.

One-compartment models, SI floats (M, s, 1/s), vectorised across compounds:

* iv bolus: C = C0 exp(-ke t), ke = ln2 / half-life.
* oral, first-order absorption (Bateman; IUPAC Gold Book):
  C proportional to (exp(-ke t) - exp(-ka t))/(ka - ke), tmax = ln(ka/ke)/(ka - ke).
  The profile is parameterised by free Cmax, tmax and half-life: ka is solved
  from tmax (:func:`absorption_rate_from_tmax`): tmax < 1/ke gives ka > ke,
  tmax > 1/ke the flip-flop branch ka < ke, tmax = 1/ke gives ka = ke with
  C proportional to t exp(-k t) (Garrett 1994, J Pharmacokinet Biopharm
  22:103-128).  The curve is scaled so that its (first-dose) maximum is Cmax.
* repeat dosing every tau: superposition of single doses, summed in closed
  form as geometric series; steady state is the infinite sum, with
  accumulation R = 1/(1 - exp(-ke tau)) (textbook PK, e.g. Rowland & Tozer).

Public functions
----------------
``elimination_rate(half_life)``, ``bateman_tmax(ka, ke)``,
``absorption_rate_from_tmax(tmax, ke)``, ``accumulation_ratio(ke, tau)``,
``concentration(t, *, route, cmax, half_life, tmax=None, dosing_interval=None, n_doses=1, steady_state=False)``,
and :class:`Regimen` (the vectorised evaluator used by the engagement module:
``Regimen.build(...)`` then ``.local(m, s)`` -> (C, dC/dt) at time s after
dose m, with all doses 0..m given).

Free concentrations are inputs; these functions do not predict them.
Simulations are decision support, not dosing advice.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.special import lambertw

from ..errors import InputError
from .equations import LN2

FloatArray = npt.NDArray[np.float64]

__all__ = [
    "elimination_rate",
    "bateman_tmax",
    "absorption_rate_from_tmax",
    "accumulation_ratio",
    "concentration",
    "Regimen",
    "ROUTES",
]

ROUTES = ("oral", "iv")
#: largest tmax accepted, in elimination time constants (tmax x ke).  Deep flip-flop absorption
#: (ka = ke e^-50 at the limit, already far outside pharmacology) is simulated to the stated
#: tolerance up to here (tests/kinetics/test_engagement.py); beyond it the input is refused.
MAX_TMAX_KE = 50.0
_NEAR = 1e-5  # |ka-ke|/(ka+ke) below which the Bateman divided difference uses its derivative


def elimination_rate(half_life: npt.ArrayLike) -> FloatArray:
    """ke = ln2 / t1/2 (1/s)."""
    hl = np.asarray(half_life, dtype=float)
    if np.any(~np.isfinite(hl)) or np.any(hl <= 0):
        raise InputError("half-life must be positive and finite")
    return np.asarray(LN2 / hl, dtype=np.float64)


def bateman_tmax(ka: npt.ArrayLike, ke: npt.ArrayLike) -> FloatArray:
    """tmax = ln(ka/ke)/(ka - ke) (IUPAC Gold Book); 1/k at ka = ke (Garrett 1994)."""
    ka_, ke_ = np.broadcast_arrays(np.asarray(ka, dtype=float), np.asarray(ke, dtype=float))
    v = np.log(ka_ / ke_)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.where(v == 0, 1.0, v / np.expm1(np.where(v == 0, 1.0, v)))
    return np.asarray(r / ke_, dtype=np.float64)


def _h(v: FloatArray) -> tuple[FloatArray, FloatArray]:
    """v/expm1(v) and its derivative, accurate near v = 0."""
    small = np.abs(v) < 1e-3
    vs = np.where(small, 1.0, v)
    em = np.expm1(vs)
    h = np.where(small, 1 - v / 2 + v**2 / 12 - v**4 / 720, vs / em)
    dh = np.where(small, -0.5 + v / 6 - v**3 / 180, (em - vs * np.exp(vs)) / em**2)
    return h, dh


def absorption_rate_from_tmax(tmax: npt.ArrayLike, ke: npt.ArrayLike) -> FloatArray:
    """ka (1/s) from tmax and ke for the Bateman function.

    With T = ke tmax and v = ln(ka/ke), tmax = ln(ka/ke)/(ka-ke) reads
    v/(e^v - 1) = T, decreasing in v, so ka is unique: v > 0 (ka > ke) for
    T < 1, v < 0 (flip-flop) for T > 1, v = 0 (ka = ke) for T = 1.  Solved by
    the Lambert W branch that is not the trivial root
    (v = -W(-T e^-T) - T, W_-1 for T < 1, W_0 for T > 1), then polished by
    Newton steps (the branch point at T = 1 costs Lambert W precision).
    """
    tmax, ke = np.broadcast_arrays(np.asarray(tmax, dtype=float), np.asarray(ke, dtype=float))
    if np.any(~np.isfinite(tmax)) or np.any(tmax <= 0):
        raise InputError("tmax must be positive and finite")
    T = tmax * ke
    if np.any(T > MAX_TMAX_KE):
        raise InputError(f"tmax is implausibly long for this half-life: more than {MAX_TMAX_KE:g} elimination time constants "
                         f"(tmax x ln2/t½ > {MAX_TMAX_KE:g}; absorption would be over e^{MAX_TMAX_KE:g} times slower than elimination)")
    arg = -T * np.exp(-T)
    arg = np.maximum(arg, -np.exp(-1.0))
    w = np.where(T < 1, lambertw(arg, -1).real, lambertw(arg, 0).real)
    v = np.where(T == 1, 0.0, -w - T)
    for _ in range(4):
        h, dh = _h(v)
        v = v - (h - T) / dh
    return np.asarray(ke * np.exp(v), dtype=np.float64)


def accumulation_ratio(ke: npt.ArrayLike, tau: npt.ArrayLike) -> FloatArray:
    """R = 1/(1 - exp(-ke tau)) (textbook PK: Rowland & Tozer)."""
    return np.asarray(1.0 / -np.expm1(-np.asarray(ke, dtype=float) * np.asarray(tau, dtype=float)), dtype=np.float64)


# ----------------------------------------------------------------------------- regimen
def _geom(k: Any, tau: Any, m: float) -> tuple[Any, Any]:
    """sum_{i=0..m} exp(-k i tau), and sum_{i=0..m} i exp(-k i tau).  m may be inf."""
    with np.errstate(invalid="ignore", over="ignore"):
        x = k * tau
        if m == 0:
            return np.ones_like(x), np.zeros_like(x)
        em1 = np.expm1(-x)  # q - 1
        q = np.exp(-x)
        if np.isinf(m):
            g = -1.0 / em1
            s1 = q / em1**2
        else:
            g = np.expm1(-x * (m + 1)) / em1
            s1 = q * (1.0 - (m + 1) * q**m + m * q ** (m + 1)) / em1**2
            # q -> 1 (tau << 1/k): cancellation; the polynomial limit is m(m+1)/2
            s1 = np.where(x < 1e-6, m * (m + 1) / 2.0, s1)
    return g, s1


@dataclass(frozen=True)
class Regimen:
    """Vectorised dosing regimen (one row per compound).

    ``oral``: bool array; ``ke``, ``ka`` (ka unused for iv); ``scale``: the
    Bateman prefactor D with C = D (e^-ke t - e^-ka t)/(ka - ke) for one dose,
    or C0 for iv; ``tau``: dosing interval (inf for a single dose);
    ``n_doses``: int (same for all rows); ``tmax`` (0 for iv) and ``cmax``:
    the single-dose free Cmax (C0 for iv).
    """

    oral: npt.NDArray[np.bool_]
    ke: FloatArray
    ka: FloatArray
    scale: FloatArray
    tau: FloatArray
    n_doses: int
    tmax: FloatArray
    cmax: FloatArray

    @classmethod
    def build(cls, route: Any, cmax: npt.ArrayLike, half_life: npt.ArrayLike, tmax: npt.ArrayLike | None = None,
              dosing_interval: npt.ArrayLike | None = None, n_doses: int = 1) -> Regimen:
        route = np.asarray(route)
        bad = ~np.isin(route, ROUTES)
        if np.any(bad):
            raise InputError(f"unknown route {route[bad].ravel()[0]!r}: use oral or iv")
        cmax_a = np.asarray(cmax, dtype=float)
        if np.any(~np.isfinite(cmax_a)) or np.any(cmax_a <= 0):
            raise InputError("free Cmax must be positive and finite")
        ke = elimination_rate(half_life)
        oral = route == "oral"
        if np.any(oral):
            if tmax is None:
                raise InputError("oral dosing needs tmax")
            tmax_a = np.asarray(tmax, dtype=float)
            if np.any(oral & ~(np.isfinite(tmax_a) & (tmax_a > 0))):
                raise InputError("tmax must be positive and finite for oral dosing")
        else:
            tmax_a = np.zeros(())
        tau_a: Any
        if dosing_interval is None:
            tau_a = np.inf
        else:
            tau_a = np.asarray(dosing_interval, dtype=float)
            if np.any(~np.isfinite(tau_a)) or np.any(tau_a <= 0):
                raise InputError("dosing interval must be positive and finite")
        n = int(n_doses)
        if n < 1 or n != n_doses:
            raise InputError("number of doses must be a whole number >= 1")
        if n > 1 and dosing_interval is None:
            raise InputError("repeat dosing needs a dosing interval")
        oral_b, ke_b, cmax_b, tmax_b, tau_b = np.broadcast_arrays(oral, ke, cmax_a, tmax_a, np.asarray(tau_a, dtype=float))
        oral = np.array(oral_b, dtype=bool).ravel()
        ke, cmax_f, tmax_a, tau = (np.array(a, dtype=np.float64).ravel() for a in (ke_b, cmax_b, tmax_b, tau_b))
        tm = np.where(oral, tmax_a, 1.0 / ke)  # dummy for iv rows
        ka = np.where(oral, absorption_rate_from_tmax(tm, ke), ke)
        shape1 = _single_shape(tm, ka, ke)
        scale = np.where(oral, cmax_f / shape1, cmax_f)
        return cls(oral, ke, ka, scale, tau, n, np.where(oral, tmax_a, 0.0), cmax_f)

    # -- evaluation -----------------------------------------------------------
    def local(self, m: float, s: Any, rows: Any = None) -> tuple[FloatArray, FloatArray]:
        """(C, dC/dt) at time ``s`` (broadcast against rows) after dose ``m``, doses 0..m given.

        ``m`` is an int or ``inf`` (steady state); ``s`` >= 0.  ``rows``
        selects compounds (default all); ``s`` must broadcast to (rows, ...).
        """
        r = slice(None) if rows is None else rows
        ke: Any = self.ke[r]
        ka: Any = self.ka[r]
        tau: Any = self.tau[r]
        oral: Any = self.oral[r]
        scale: Any = self.scale[r]
        s = np.asarray(s, dtype=float)
        extra = (None,) * (s.ndim - 1) if s.ndim else ()
        ke, ka, tau, oral, scale = (a[(Ellipsis,) + extra] if s.ndim else a for a in (ke, ka, tau, oral, scale))
        ge, s1e = _geom(ke, tau, m)
        all_oral = bool(np.all(oral))
        if not all_oral:
            fe = np.exp(-ke * s) * ge
            c_iv = scale * fe
            dc_iv = -ke * c_iv
            if not np.any(oral):
                return c_iv, dc_iv
        c_or, dc_or = _bateman_sum(s, ke, ka, tau, m, ge, s1e)
        if all_oral:
            return scale * c_or, scale * dc_or
        c = np.where(oral, scale * c_or, c_iv)
        dc = np.where(oral, scale * dc_or, dc_iv)
        return c, dc

    def at(self, t: npt.ArrayLike, steady_state: bool = False) -> FloatArray:
        """C at global times ``t`` (rows x times, or broadcastable), right-continuous at doses."""
        t2 = np.atleast_1d(np.asarray(t, dtype=float))
        if t2.ndim == 1:
            t2 = np.broadcast_to(t2, (self.ke.size, t2.size))
        out = np.zeros(t2.shape)
        tau = self.tau[:, None]
        if steady_state:
            s = np.mod(t2, tau)
            c, _ = self.local(np.inf, s)
            return c
        dose = np.where(np.isfinite(tau), np.floor(t2 / np.where(np.isfinite(tau), tau, 1.0)), 0.0)
        dose = np.clip(dose, 0, self.n_doses - 1)
        for m in range(self.n_doses):
            sel = (dose == m) & (t2 >= 0)
            if not sel.any():
                continue
            s = np.where(sel, t2 - m * np.where(np.isfinite(tau), tau, 0.0), 0.0)
            c, _ = self.local(m, s)
            out = np.where(sel, c, out)
        return out


def _single_shape(t: Any, ka: Any, ke: Any) -> FloatArray:
    """(e^-ke t - e^-ka t)/(ka - ke), stably (t e^-k t at ka = ke)."""
    k1 = np.minimum(ka, ke)
    d = np.abs(ka - ke)
    x = d * t
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(x > 0, -np.expm1(-x) / np.where(x > 0, d, 1.0), t)
    return np.asarray(np.exp(-k1 * t) * ratio, dtype=np.float64)


def _bateman_sum(s: Any, ke: Any, ka: Any, tau: Any, m: float, ge: Any, s1e: Any) -> tuple[Any, Any]:
    """Superposed unit Bateman curves and their time derivative at s after dose m."""
    if m == 0:
        k1 = np.minimum(ka, ke)
        k2 = np.maximum(ka, ke)
        # (1 - e^-d s)/d -> s as d -> 0; a floor of 1e-280 on d keeps that limit to ~1e-270 relative
        d = np.maximum(k2 - k1, 1e-280)
        ratio = -np.expm1(-d * s) / d
        e1 = np.exp(-k1 * s)
        c = e1 * ratio
        dc = e1 * (1.0 - k2 * ratio)
        return c, dc
    ga, s1a = _geom(ka, tau, m)
    fe = np.exp(-ke * s) * ge
    fa = np.exp(-ka * s) * ga
    with np.errstate(invalid="ignore", divide="ignore"):
        c_dir = (fe - fa) / (ka - ke)
        dc_dir = (ka * fa - ke * fe) / (ka - ke)
    near = np.abs(ka - ke) <= _NEAR * (ka + ke)
    if np.any(near):
        k = 0.5 * (ka + ke)
        g, s1 = _geom(k, tau, m)
        ex = np.exp(-k * s)
        f = ex * g
        tau_s1 = np.where(s1 == 0, 0.0, tau * s1)
        fk = -ex * (s * g + tau_s1)  # dF/dk
        c_near = -fk
        dc_near = f + k * fk  # d(kF)/dk
        c_dir = np.where(near, c_near, c_dir)
        dc_dir = np.where(near, dc_near, dc_dir)
    return c_dir, dc_dir


def concentration(t: npt.ArrayLike, *, route: Any, cmax: npt.ArrayLike, half_life: npt.ArrayLike,
                  tmax: npt.ArrayLike | None = None, dosing_interval: npt.ArrayLike | None = None, n_doses: int = 1,
                  steady_state: bool = False) -> FloatArray:
    """Free concentration (M) at times ``t`` (s) for each compound.

    Scalars give a 1-d array over ``t``; arrays of compounds give
    (n_compounds, len(t)).  ``steady_state=True`` evaluates the periodic
    steady state (infinitely many doses) at ``t mod tau``.
    """
    reg = Regimen.build(route, cmax, half_life, tmax, dosing_interval, n_doses)
    t_a = np.asarray(t, dtype=float)
    c = reg.at(np.atleast_1d(t_a), steady_state=steady_state)
    scalar_params = all(np.ndim(a) == 0 for a in (route, cmax, half_life, tmax if tmax is not None else 0.0))
    if scalar_params:
        c = c[0]
        return c.reshape(t_a.shape) if t_a.ndim else np.asarray(c[0], dtype=np.float64)
    return c
