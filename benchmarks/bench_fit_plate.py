"""Benchmark: Motulsky-Mahan global fits of one 384-well plate, closed form vs ODE.

The plate: 24 compounds x 16 wells (competitor at 0 and seven half-log
concentrations, in duplicate) x 120 readings (one a minute for two hours),
tracer binding simulated from the Motulsky & Mahan 1984 closed form with 2%
noise.  Each compound is one global fit (k3, k4, Bmax and a baseline shared
across its 16 wells).

The same fit is done twice in the same run, through the same engine
(variable projection on k3, k4 with Bmax and baseline solved exactly, the
Jacobian at the optimum, covariance intervals) from the same starting point: once with the closed form, once with
the scheme's differential equations integrated by scipy solve_ivp (LSODA,
rtol 1e-9, analytic Jacobian, all concentrations of a compound in one linear
system, i.e. a strong ODE implementation).  The table reports wall times, their
ratio (goal >= 50x) and whether k3 and k4 agree to 3 significant figures; a
second row times the public ``fit_competition_kinetics`` (which adds a
starting-value grid and three starts) against the same ODE fit.

Run: ``python benchmarks/bench_fit_plate.py [repeats]``; from code,
``run(repeats=3) -> list[dict]``.
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

import numpy as np
from scipy.integrate import solve_ivp

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))


from tracker.kinetics.fitting import engine as fitting_mod  # noqa: E402
from tracker.kinetics.fitting import common as fitting_common  # noqa: E402
from tracker.kinetics.fitting import curves as fitting_curves  # noqa: E402
from tracker.kinetics.fitting import intervals as fitting_iv  # noqa: E402
from tracker.kinetics import equations as eq  # noqa: E402
from tracker.kinetics.fitting import fit_competition_kinetics  # noqa: E402
from tracker.kinetics.equations import motulsky_mahan  # noqa: E402

GOAL = 50.0
N_COMPOUNDS, N_WELLS, N_TIMES = 24, 16, 120
TRACER = {"tracer_kon": 1e7, "tracer_koff": 1e-3, "tracer_conc": 2e-9}  # /M/s, /s, M
LEVELS = np.r_[0.0, 1e-9 * 10 ** (0.5 * np.arange(7))]  # 0 and 1 nM .. 1 uM, half-log steps
ODE_KIND = "motulsky-mahan-ode"
DIFF_STEP = 1e-6  # finite-difference step for both fits: the ODE output is not smooth at ~1e-8


def make_plate(seed: int = 384):
    """24 compounds, one plate column each: (truth, t, signal, competitor conc, well labels)."""
    rng = np.random.default_rng(seed)
    t1 = np.arange(N_TIMES) * 60.0
    conc_w = np.repeat(LEVELS, 2)
    plate = []
    for c in range(N_COMPOUNDS):
        k3 = 10 ** rng.uniform(5.0, 7.0)
        k4 = 10 ** rng.uniform(-3.5, -2.0)
        t = np.tile(t1, N_WELLS)
        conc = np.repeat(conc_w, N_TIMES)
        y = motulsky_mahan(t, TRACER["tracer_conc"], TRACER["tracer_kon"], TRACER["tracer_koff"], conc, k3, k4, 1000.0)
        y = y + 10.0 + rng.normal(0, 20.0, y.size)
        wells = [f"{row}{c + 1}" for row in "ABCDEFGHIJKLMNOP"[:N_WELLS]]  # compound c fills plate column c+1
        plate.append(({"kon": k3, "koff": k4}, t, y, conc, np.repeat(wells, N_TIMES)))
    return plate


# ----------------------------------------------------------------- ODE model
def _ode_shape(t, conc, k1, k2, L, k3, k4, bmax=1.0):
    """Tracer binding from R+L <-> RL, R+I <-> RI integrated for every distinct I at once."""
    t = np.asarray(t, float)
    levels, inv = np.unique(conc, return_inverse=True)
    m = levels.size
    tt, tinv = np.unique(t, return_inverse=True)

    a = np.zeros((2 * m, 2 * m))
    for i, I in enumerate(levels):
        a[2 * i, 2 * i] = -(k1 * L + k2)
        a[2 * i, 2 * i + 1] = -k1 * L
        a[2 * i + 1, 2 * i] = -k3 * I
        a[2 * i + 1, 2 * i + 1] = -(k3 * I + k4)
    c = np.zeros(2 * m)
    c[0::2] = k1 * L * bmax
    c[1::2] = k3 * levels * bmax

    sol = solve_ivp(lambda _, y: a @ y + c, (0.0, float(tt[-1]) if tt[-1] > 0 else 1.0), np.zeros(2 * m),
                    t_eval=tt, method="LSODA", rtol=1e-9, atol=1e-12 * bmax, jac=lambda *_: a)
    if not sol.success:
        return np.full(t.shape, np.nan)
    rl = sol.y[0::2]  # (levels, times)
    return rl[inv, tinv]


def _cf_ode(p, x, idx, curves, ctx):
    conc = np.array([cv.conc for cv in curves], float)[idx]
    return p["baseline"] + _ode_shape(x, conc, ctx["tracer_kon"], ctx["tracer_koff"], ctx["tracer_conc"],
                                      p["kon"], p["koff"], p["bmax"])


def fit_same(t, y, conc, labels, start, model: str) -> dict:
    """One compound's global fit through the engine, closed form or ODE, from ``start``.

    Identical procedure for both models: variable projection on (k3, k4) with
    Bmax and baseline solved exactly, the Jacobian at the optimum, covariance intervals.
    """
    fitting_curves.CURVE_FUNCTIONS.setdefault(ODE_KIND, _cf_ode)
    curves, idx = fitting_common._group(t.size, labels, conc)
    levels = np.array([c.conc for c in curves])
    P = fitting_mod.Param
    ps = [P("kon", start["kon"], True, *fitting_mod.KON_LIMITS, key=True),
          P("koff", start["koff"], True, *fitting_mod.KOFF_LIMITS, key=True), P("bmax", 1.0), P("baseline", 0.0)]
    kind = "motulsky-mahan" if model == "closed" else ODE_KIND
    prob = fitting_mod._Problem(kind, ps, t, y, idx, curves, TRACER)
    ones = np.ones_like(t)
    k1, k2, L = TRACER["tracer_kon"], TRACER["tracer_koff"], TRACER["tracer_conc"]
    if model == "closed":
        def shape(p):
            return eq.motulsky_mahan_levels(t, idx, L, k1, k2, levels, p["kon"], p["koff"])
    else:
        conc_pt = levels[idx]

        def shape(p):
            return _ode_shape(t, conc_pt, k1, k2, L, p["kon"], p["koff"])

    fit = fitting_mod._run_vp(prob, ["kon", "koff"], lambda p: np.column_stack([shape(p), ones]),
                              lambda c: {"bmax": c[0], "baseline": c[1]},
                              [[math.log10(start["kon"]), math.log10(start["koff"])]], diff_step=DIFF_STEP)
    ivs = fitting_iv._intervals(fit, "covariance")
    return {"kon": fit.value("kon"), "koff": fit.value("koff"), "koff_ci": fitting_iv._ci(fit, ivs, "koff")}


def _start(t, y, conc):
    """The best point of the starting-value grid that fit_competition_kinetics uses."""
    grid_k4 = fitting_common._rate_grid(t, 12)
    ipos = conc[conc > 0]
    grid_ki = np.geomspace(ipos.min() / 300.0, ipos.max() * 10.0, 12)
    ones = np.ones_like(t)
    best = None
    for k4 in grid_k4:
        for ki in grid_ki:
            k3 = float(np.clip(k4 / ki, 1e2, 1e9))
            s = motulsky_mahan(t, TRACER["tracer_conc"], TRACER["tracer_kon"], TRACER["tracer_koff"], conc, k3, k4)
            _, ssr = fitting_mod._lin(np.column_stack([s, ones]), y)
            if best is None or ssr < best[0]:
                best = (ssr, k3, k4)
    return {"kon": best[1], "koff": best[2]}


# ----------------------------------------------------------------- run
def _time(fn, repeats):
    best, out = math.inf, None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def run(repeats: int = 3) -> list[dict]:
    """Time the plate both ways; one dict per table row."""
    plate = make_plate()
    starts = [_start(t, y, conc) for _, t, y, conc, _ in plate]  # shared, untimed

    # compound by compound, closed form and ODE interleaved so both see the same machine load;
    # best of several runs per compound (the cheap closed form gets more runs to filter load spikes)
    t_cf = t_ode = 0.0
    est_cf, est_ode = [], []
    for (_, t, y, conc, lab), s in zip(plate, starts):
        dt, e = _time(lambda: fit_same(t, y, conc, lab, s, "closed"), max(5, 3 * repeats))
        t_cf += dt
        est_cf.append(e)
        dt, e = _time(lambda: fit_same(t, y, conc, lab, s, "ode"), repeats)
        t_ode += dt
        est_ode.append(e)

    def public():
        return [fit_competition_kinetics(t, y, conc, curve=lab, intervals="covariance", **TRACER).estimates
                for _, t, y, conc, lab in plate]

    t_pub, est_pub = _time(public, max(3, repeats))
    rel = [max(abs(a[k] - b[k]) / abs(a[k]) for k in ("kon", "koff")) for a, b in zip(est_cf, est_ode)]
    rel_pub = [max(abs(a[k] - b[k]) / abs(a[k]) for k in ("kon", "koff")) for a, b in zip(est_pub, est_ode)]
    truth_err = [max(abs(a[k] - tr[k]) / tr[k] for k in ("kon", "koff")) for a, (tr, *_rest) in zip(est_cf, plate)]
    covered = sum(a["koff_ci"][0] <= tr["koff"] <= a["koff_ci"][1] for a, (tr, *_r) in zip(est_cf, plate))

    # one model evaluation of one compound (16 wells x 120 points)
    _, t, _y, conc, _lab = plate[0]
    k = plate[0][0]
    levels, idx = np.unique(conc, return_inverse=True)
    k1, k2, L = TRACER["tracer_kon"], TRACER["tracer_koff"], TRACER["tracer_conc"]
    n_eval = 20
    t_ev_cf, _ = _time(lambda: [eq.motulsky_mahan_levels(t, idx, L, k1, k2, levels, k["kon"], k["koff"])
                                for _ in range(n_eval)], repeats)
    t_ev_ode, _ = _time(lambda: [_ode_shape(t, conc, k1, k2, L, k["kon"], k["koff"]) for _ in range(n_eval)], repeats)
    n_points = N_WELLS * N_TIMES
    plate_name = f"{N_COMPOUNDS} cpds x {N_WELLS} wells x {N_TIMES} pts"
    return [
        {
            "case": f"plate fit, same procedure ({plate_name})",
            "closed_form_s": t_cf, "ode_s": t_ode, "ratio": t_ode / t_cf, "goal": GOAL, "met": t_ode / t_cf >= GOAL,
            "max_rel_diff_kon_koff": max(rel), "agree_3_sig_figs": max(rel) < 5e-4,
            "max_rel_error_vs_truth": max(truth_err), "koff_ci_covers_truth": f"{covered}/{len(plate)}",
        },
        {
            "case": "plate fit, public fit_competition_kinetics",
            "closed_form_s": t_pub, "ode_s": t_ode, "ratio": t_ode / t_pub, "goal": None, "met": None,
            "max_rel_diff_kon_koff": max(rel_pub), "agree_3_sig_figs": max(rel_pub) < 5e-4,
        },
        {
            "case": f"one model evaluation ({n_points} points)",
            "closed_form_s": t_ev_cf / n_eval, "ode_s": t_ev_ode / n_eval, "ratio": t_ev_ode / t_ev_cf,
            "goal": None, "met": None, "max_rel_diff_kon_koff": None, "agree_3_sig_figs": None,
        },
    ]


def print_table(rows: list[dict]) -> None:
    head = f"{'case':<46} {'closed form':>12} {'ODE':>10} {'ratio':>8} {'goal':>6} {'met':>5} {'max rel diff':>13} {'3 s.f.':>7}"
    print(head)
    print("-" * len(head))
    for r in rows:
        goal = f"{r['goal']:.0f}x" if r["goal"] else ""
        met = "" if r["met"] is None else ("yes" if r["met"] else "NO")
        diff = "" if r["max_rel_diff_kon_koff"] is None else f"{r['max_rel_diff_kon_koff']:.1e}"
        agree = "" if r["agree_3_sig_figs"] is None else ("yes" if r["agree_3_sig_figs"] else "NO")
        print(f"{r['case']:<46} {_fmt_s(r['closed_form_s']):>12} {_fmt_s(r['ode_s']):>10} {r['ratio']:>7.0f}x "
              f"{goal:>6} {met:>5} {diff:>13} {agree:>7}")
    if rows and rows[0].get("max_rel_error_vs_truth") is not None:
        print(f"closed-form k3/k4 vs simulation truth: worst relative error {rows[0]['max_rel_error_vs_truth']:.1%}; "
              f"koff 95% CI covers the truth for {rows[0]['koff_ci_covers_truth']} compounds")
    print("'same procedure': one start, variable projection on k3/k4, covariance CI, only the model swapped;"
          " 'public' adds the starting-value grid and three starts.")


def _fmt_s(s: float) -> str:
    return f"{s * 1e3:.2f} ms" if s < 1 else f"{s:.2f} s"


if __name__ == "__main__":
    print_table(run(int(sys.argv[1]) if len(sys.argv) > 1 else 3))
