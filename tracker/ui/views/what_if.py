"""What-if: start from a stored compound, move its kinetics, incubation and PK, and watch grade and charts change.

Nothing is written: the page edits a copy of the frames the grader reads and
calls the pure grader (:func:`tracker.rules.grader.grade_frames`) and the pure
simulations directly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
import streamlit as st

from tracker.errors import KrtError
from tracker.ui import data, evidence, theme, widgets
from tracker.ui.main import context
from tracker.ui.views.compound import pick_compound

H = 3600.0
NM = 1e-9


def log_options(lo: float, hi: float, per_decade: int = 6, include: tuple[float, ...] = ()) -> list[float]:
    """Log-spaced slider stops from ``lo`` to ``hi`` (3 significant figures) plus the values in ``include``."""
    n = int(round(math.log10(hi / lo) * per_decade)) + 1
    vals = {float(f"{v:.3g}") for v in np.geomspace(lo, hi, n)}
    vals |= {float(f"{v:.3g}") for v in include if v and math.isfinite(v) and v > 0}
    return sorted(vals)


def nearest(options: list[float], value: float) -> float:
    return min(options, key=lambda o: abs(math.log(o) - math.log(value)))


@dataclass(frozen=True)
class Scenario:
    """The what-if values (SI).  ``rt_s``/``kon`` None = no kinetics; ``pk_*`` None = no PK."""

    rt_s: float | None
    kon: float | None
    incubation_s: float | None
    potency_id: int | None  # the potency row whose incubation the slider moves
    pk_route: str | None
    pk_half_life_s: float | None
    pk_cmax_M: float | None
    pk_tmax_s: float | None
    pk_interval_s: float | None


def stored_scenario(portfolio, cid: int, configs=None, versions=None) -> Scenario:
    """The compound's stored values as a starting point (kinetics as the grader's evidence model selects them)."""
    from tracker.rules.grader import grade_frames

    name = portfolio.compounds.loc[portfolio.compounds["id"] == cid, "name"].iloc[0]
    k = evidence.of(grade_frames(portfolio, configs, versions), name)
    pot = portfolio.potency[portfolio.potency["compound_id"] == cid]
    best = pot.sort_values(["incubation_s", "id"]).iloc[0] if not pot.empty else None  # the shortest read: most at risk
    inc = float(best["incubation_s"]) if best is not None else None
    pid = int(best["id"]) if best is not None else None
    pk = portfolio.pk[portfolio.pk["compound_id"] == cid]
    if pk.empty:
        route = hl = cmax = tmax = tau = None
    else:
        r = pk.iloc[-1]
        route, hl, cmax = str(r["route"]), float(r["half_life_s"]), float(r["free_cmax_M"])
        tmax = float(r["tmax_s"]) if pd.notna(r.get("tmax_s")) else None
        tau = float(r["dosing_interval_s"]) if pd.notna(r.get("dosing_interval_s")) else None
    return Scenario(
        rt_s=(k.rt_s if k.koff else None), kon=(k.kon if k.kon else None), incubation_s=inc, potency_id=pid,
        pk_route=route, pk_half_life_s=hl, pk_cmax_M=cmax, pk_tmax_s=tmax, pk_interval_s=tau,
    )


def apply(portfolio, cid: int, s: Scenario, base: Scenario):
    """A copy of ``portfolio`` with compound ``cid`` moved from ``base`` to scenario ``s``.

    Only what differs from ``base`` is edited, so ``apply(p, cid, base, base)``
    grades exactly like the stored evidence; other compounds are untouched.
    """
    from tracker.rules.grader import Portfolio

    kin, pot, pk, tcs = portfolio.kinetics, portfolio.potency, portfolio.pk, portfolio.time_courses
    if (s.rt_s, s.kon) != (base.rt_s, base.kon):
        kin = kin[kin["compound_id"] != cid].copy()
        if s.rt_s and s.kon:
            koff = 1.0 / s.rt_s
            row = {c: np.nan for c in portfolio.kinetics.columns}
            row.update({"id": -1, "compound_id": cid, "method": "other", "kon_per_M_s": s.kon, "koff_per_s": koff,
                        "koff_given_as": "koff", "kd_M": koff / s.kon, "fit_json": None, "source": "what-if"})
            kin = pd.concat([kin, pd.DataFrame([row])], ignore_index=True)
            # measured kinetics replace the stored qualitative fits of this compound as evidence
            if tcs is not None and not tcs.empty:
                tcs = tcs[tcs["compound_id"] != cid]
    if s.incubation_s != base.incubation_s and s.potency_id is not None:
        pot = pot.copy()
        pot.loc[pot["id"] == s.potency_id, "incubation_s"] = s.incubation_s
    pk_fields = ("pk_route", "pk_half_life_s", "pk_cmax_M", "pk_tmax_s", "pk_interval_s")
    if any(getattr(s, f) != getattr(base, f) for f in pk_fields):
        pk = pk[pk["compound_id"] != cid].copy()
        if s.pk_route and s.pk_half_life_s and s.pk_cmax_M:
            row = {c: np.nan for c in portfolio.pk.columns}
            row.update({"id": -1, "compound_id": cid, "species": "what-if", "route": s.pk_route, "half_life_s": s.pk_half_life_s,
                        "free_cmax_M": s.pk_cmax_M, "tmax_s": s.pk_tmax_s if s.pk_route == "oral" else np.nan,
                        "dosing_interval_s": s.pk_interval_s if s.pk_interval_s else np.nan})
            pk = pd.concat([pk, pd.DataFrame([row])], ignore_index=True)
    return Portfolio(compounds=portfolio.compounds, programs=portfolio.programs, potency=pot, kinetics=kin, pk=pk,
                     time_courses=tcs)


def scenario_result(portfolio, configs, versions, cid: int, s: Scenario, base: Scenario):
    """The grader's full result under scenario ``s`` (pure: the grader on edited frames)."""
    from tracker.rules.grader import grade_frames

    return grade_frames(apply(portfolio, cid, s, base), configs, versions)


def grade_scenario(portfolio, configs, versions, cid: int, s: Scenario, base: Scenario) -> dict:
    """The compound's grading entry under scenario ``s``."""
    result = scenario_result(portfolio, configs, versions, cid, s, base)
    name = portfolio.compounds.loc[portfolio.compounds["id"] == cid, "name"].iloc[0]
    return next(e for e in result.to_records() if e["compound"] == name)


def render() -> None:
    ctx = context()
    st.title("What-if")
    st.caption("Start from a stored compound and move its residence time, kon, assay incubation and PK. "
               "The grade, findings and charts follow; nothing is saved.")
    widgets.safety_box()
    name = pick_compound(ctx)
    if name is None:
        return
    try:
        portfolio, configs, versions, cid = data.series_frames(ctx.url, ctx.version, name)
    except KrtError as exc:
        st.error(widgets.md(widgets.one_line(exc)))
        return
    base = stored_scenario(portfolio, cid, configs, versions)
    program = portfolio.programs[portfolio.programs["name"] == portfolio.compounds.loc[portfolio.compounds["id"] == cid, "program"].iloc[0]]
    program = program.iloc[0].to_dict() if not program.empty else {}
    key = f"wi_{name}"

    st.subheader("Kinetics and assay")
    use_kin = st.toggle("Residence time known", value=base.rt_s is not None, key=f"{key}_kin",
                        help="Off: as if no kinetics had been measured")
    c = st.columns(3)
    s = base
    if use_kin:
        rt_opts = log_options(10.0, 30 * 86400.0, 6, (base.rt_s or H,))
        rt = c[0].select_slider("Residence time", rt_opts, value=nearest(rt_opts, base.rt_s or H), format_func=widgets.dur, key=f"{key}_rt")
        kon_opts = log_options(1e3, 1e9, 4, (base.kon or 1e6,))
        kon = c[1].select_slider("kon (/M/s)", kon_opts, value=nearest(kon_opts, base.kon or 1e6),
                                 format_func=lambda v: f"{v:.3g}", key=f"{key}_kon")
        s = replace(s, rt_s=rt, kon=kon)
    else:
        s = replace(s, rt_s=None, kon=None)
    if base.incubation_s:
        pot_rows = portfolio.potency[portfolio.potency["compound_id"] == cid]
        assay = pot_rows.loc[pot_rows["id"] == base.potency_id, "assay"].iloc[0]
        inc_opts = log_options(60.0, 72 * H, 6, (base.incubation_s,))
        inc = c[2].select_slider(f"Incubation of {assay}", inc_opts, value=nearest(inc_opts, base.incubation_s),
                                 format_func=widgets.dur, key=f"{key}_inc")
        s = replace(s, incubation_s=inc)

    st.subheader("PK")
    use_pk = st.toggle("PK profile", value=base.pk_route is not None, key=f"{key}_pk")
    p = st.columns(5)
    if use_pk:
        route = p[0].radio("Route", ["oral", "iv"], index=0 if (base.pk_route or "oral") == "oral" else 1, key=f"{key}_route", horizontal=True)
        hl_opts = log_options(600.0, 72 * H, 6, (base.pk_half_life_s or 4 * H,))
        hl = p[1].select_slider("Half-life", hl_opts, value=nearest(hl_opts, base.pk_half_life_s or 4 * H), format_func=widgets.dur, key=f"{key}_hl")
        cm_opts = log_options(1e-11, 1e-5, 6, (base.pk_cmax_M or 50 * NM,))
        cm = p[2].select_slider("Free Cmax", cm_opts, value=nearest(cm_opts, base.pk_cmax_M or 50 * NM), format_func=widgets.conc, key=f"{key}_cmax")
        tmax = None
        if route == "oral":
            tm_opts = log_options(300.0, 12 * H, 6, (base.pk_tmax_s or H,))
            tmax = p[3].select_slider("tmax", tm_opts, value=nearest(tm_opts, base.pk_tmax_s or H), format_func=widgets.dur, key=f"{key}_tmax")
        taus = [0.0, 6 * H, 8 * H, 12 * H, 24 * H, 48 * H]
        tau0 = base.pk_interval_s or (program.get("dosing_interval_s") if program.get("dosing_interval_s") == program.get("dosing_interval_s") else None) or 0.0
        if tau0 not in taus:
            taus = sorted(set(taus) | {float(tau0)})
        tau = p[4].select_slider("Dosing interval", taus, value=float(tau0), format_func=lambda v: "single dose" if not v else f"every {widgets.dur(v)}",
                                 key=f"{key}_tau")
        s = replace(s, pk_route=route, pk_half_life_s=hl, pk_cmax_M=cm, pk_tmax_s=tmax, pk_interval_s=tau or None)
    else:
        s = replace(s, pk_route=None, pk_half_life_s=None, pk_cmax_M=None, pk_tmax_s=None, pk_interval_s=None)

    try:
        stored_result = scenario_result(portfolio, configs, versions, cid, base, base)
        now_result = stored_result if s == base else scenario_result(portfolio, configs, versions, cid, s, base)
        stored = next(e for e in stored_result.to_records() if e["compound"] == name)
        now = next(e for e in now_result.to_records() if e["compound"] == name)
    except KrtError as exc:
        st.error(widgets.md(widgets.one_line(exc)))
        return
    st.subheader("Grade")
    g = st.columns([1, 1, 3])
    with g[0]:
        st.caption("Stored evidence")
        widgets.badge(stored["grade"])
    with g[1]:
        st.caption("This what-if")
        widgets.badge(now["grade"])
    if now["grade"] != stored["grade"]:
        g[2].markdown(f"The grade moves from **{theme.grade_label(stored['grade'])}** to **{theme.grade_label(now['grade'])}**.")
    widgets.findings_list(now["findings"])

    ev = evidence.of(now_result, name)  # the scenario's kinetics and readings, as the grader saw them
    if ev.kd:
        st.caption(f"This what-if: residence time {widgets.dur(ev.rt_s)}, KD {widgets.conc(ev.kd)}.")
    st.subheader("Apparent affinity against incubation time")
    st.altair_chart(evidence.affinity_chart(ev), width="stretch")
    st.subheader("Target engagement under PK")
    if not (ev.koff and s.pk_route):
        st.info("Needs a residence time and a PK profile (switch them on above).")
        return
    try:
        eng = evidence.engagement(now_result, ev.compound_id)
        if eng is None:
            st.info("Engagement needs kon and a complete PK profile.")
            return
        st.altair_chart(evidence.engagement_chart(eng, program), width="stretch")
        st.caption(f"The regimen the duration check judges: {evidence.engagement_regimen(eng)}.")
    except KrtError as exc:
        st.error(widgets.md(widgets.one_line(exc)))


if __name__ == "__main__":
    render()
