"""The review pack: one self-contained HTML file for a governance meeting.

It holds, for a program or a list of compounds: the always-present safety
caution, a grade summary, and per compound its grade, findings (message,
decision prompt, caution), potency against the kinetic predictions and the
charts.  Charts are rendered to static SVG by vl-convert (through Altair's
``save``) and embedded as ``data:`` URIs; the file has no scripts, no
stylesheets or fonts from elsewhere and no links out, so it opens offline and
prints as it looks.  The pack records the database's audit-chain head (last
event id and hash), which anchors it to the exact state it was built from.

:func:`build_pack` needs no Streamlit; the review-pack page and the tests call it.
"""

from __future__ import annotations

import base64
import contextvars
import datetime as dt
import functools
import html
import json
import math
import os
import re
from collections.abc import Callable, Iterable
from concurrent.futures import ThreadPoolExecutor, as_completed
from typing import Any

import altair as alt
import pandas as pd
from sqlalchemy import Engine

from ..fmt import conc as fmt_conc
from ..fmt import duration as fmt_time
from ..fmt import fold as fmt_fold
from . import charts, data, evidence, theme
from .widgets import rule_title

MAX_CHART_COMPOUNDS = 60  # beyond this, the pack lists grades and findings without per-compound charts
from ..services.history import PACK_META  # name of the <meta> that stamps a pack with its creation time and audit head


def _svg(spec_json: str) -> str:
    return _svg_cached(spec_json)


@functools.lru_cache(maxsize=512)
def _svg_cached(spec_json: str) -> str:
    import vl_convert

    return vl_convert.vegalite_to_svg(json.loads(spec_json))


def _spec_json(chart: alt.TopLevelMixin) -> str:
    # Altair's schema validation costs more than the rendering itself; the charts are
    # built by tracker.ui.charts and validated by its tests, so the pack skips it.
    return json.dumps(chart.to_dict(validate=False), sort_keys=True, default=str)


def chart_data_uri(chart: alt.TopLevelMixin) -> str:
    """An Altair chart as a ``data:image/svg+xml;base64,...`` URI (rendered offline by vl-convert)."""
    return _data_uri(_svg(_spec_json(chart)))


def _data_uri(svg: str) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(svg.encode("utf-8")).decode("ascii")


class _Charts:
    """Charts of one pack: placeholders while the HTML is assembled, rendered together at the end.

    vl-convert has a fixed cost per chart; rendering on a small thread pool and
    caching by specification (a rebuilt pack re-renders only what changed) keeps
    the demo pack within a few seconds.
    """

    def __init__(self) -> None:
        self.specs: list[str] = []
        self.alts: list[str] = []

    def img(self, chart: alt.TopLevelMixin, alt_text: str) -> str:
        self.specs.append(_spec_json(chart))
        self.alts.append(alt_text)
        return f"\x00chart{len(self.specs) - 1}\x00"

    def render(self, text: str, progress: Callable[[int, int], None] | None = None) -> str:
        if not self.specs:
            return text
        done = 0
        svgs: list[str] = [""] * len(self.specs)
        with ThreadPoolExecutor(max_workers=min(4, os.cpu_count() or 1)) as pool:
            futures = {pool.submit(_svg, spec): i for i, spec in enumerate(self.specs)}
            for fut in as_completed(futures):
                svgs[futures[fut]] = fut.result()
                done += 1
                if progress:
                    progress(done, len(self.specs))
        return _PLACEHOLDER.sub(
            lambda m: f'<img class="chart" alt="{html.escape(self.alts[int(m.group(1))])}" '
                      f'src="{_data_uri(svgs[int(m.group(1))])}">', text)


_PLACEHOLDER = re.compile("\x00chart(\\d+)\x00")
_charts: contextvars.ContextVar[_Charts | None] = contextvars.ContextVar("krt_pack_charts", default=None)


def _img(chart: alt.TopLevelMixin, alt_text: str) -> str:
    pending = _charts.get()
    if pending is None:
        return f'<img class="chart" alt="{html.escape(alt_text)}" src="{chart_data_uri(chart)}">'
    return pending.img(chart, alt_text)


def _badge(grade: object) -> str:
    g = theme.grade_style(grade)
    return f'<span class="badge" style="background:{g.colour}">{html.escape(g.badge)}</span>'


def _e(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "–"
    return html.escape(str(v))


CSS = """
body{font-family:Helvetica,Arial,sans-serif;color:#2B2F36;max-width:1100px;margin:24px auto;padding:0 16px;line-height:1.4}
h1{font-size:24px;margin-bottom:4px} h2{font-size:19px;border-bottom:2px solid #E4E1DA;padding-bottom:4px;margin-top:32px}
h3{font-size:16px;margin:18px 0 6px}
.meta{color:#6B7079;font-size:13px}
.caution{background:#FBF3E4;border-left:5px solid #C99A2E;padding:10px 14px;margin:16px 0}
.badge{color:white;border-radius:4px;padding:1px 8px;font-weight:bold;white-space:nowrap;font-size:13px}
table{border-collapse:collapse;width:100%;font-size:13px;margin:8px 0}
th,td{border-bottom:1px solid #E4E1DA;padding:4px 6px;text-align:left;vertical-align:top}
th{background:#F4F2EE}
.finding{border:1px solid #E4E1DA;border-radius:6px;padding:8px 12px;margin:8px 0}
.prompt{font-weight:bold} .fcaution{color:#7A4B0E;font-size:13px}
.chart{max-width:100%;display:block;margin:8px 0}
.compound{page-break-inside:avoid}
.structure{width:260px;height:180px;display:block;margin:4px 0}
"""


def _summary_table(rows: pd.DataFrame) -> str:
    head = "<tr><th>Compound</th><th>Program</th><th>Series</th><th>Stage</th><th>Grade</th><th>Top finding</th>" \
           "<th>Residence time</th><th>Best potency</th></tr>"
    body = []
    for r in rows.itertuples(index=False):
        top = f"{rule_title(r.top_rule)}" if isinstance(r.top_rule, str) else ""
        pot = "–"
        if isinstance(r.best_readout, str) and r.best_potency_M == r.best_potency_M:
            pot = f"{r.best_readout} {fmt_conc(r.best_potency_M)} @ {fmt_time(r.best_incubation_s)}"
        body.append(f"<tr><td>{_e(r.compound)}</td><td>{_e(r.program)}</td><td>{_e(r.series)}</td><td>{_e(r.stage)}</td>"
                    f"<td>{_badge(r.grade)}</td><td>{_e(top)}</td>"
                    f"<td>{_e(fmt_time(r.residence_time_s) if r.residence_time_s == r.residence_time_s else None)}</td>"
                    f"<td>{_e(pot)}</td></tr>")
    return f"<table>{head}{''.join(body)}</table>"


def _findings_html(findings: list[dict[str, Any]]) -> str:
    if not findings:
        return '<p>No findings: nothing in the kinetic evidence flags this compound.</p>'
    out = []
    for f in sorted(findings, key=lambda f: theme.SEVERITY_ORDER.get(f.get("severity"), 9)):
        parts = [f'<div class="finding">{_badge(f.get("severity"))} <b>{_e(rule_title(f.get("rule")))}</b>',
                 f'<p>{_e(f.get("message"))}</p>']
        if f.get("prompt"):
            parts.append(f'<p class="prompt">Decision asked: {_e(f["prompt"])}</p>')
        if f.get("caution"):
            parts.append(f'<p class="fcaution">Caution: {_e(f["caution"])}</p>')
        parts.append("</div>")
        out.append("".join(parts))
    return "".join(out)


def _potency_html(table: pd.DataFrame) -> str:
    if table.empty:
        return "<p>No potency values on record.</p>"

    from .. import fmt

    def n(v):
        return fmt.conc(None if v is None else v * 1e-9, missing="–")

    rows = "".join(
        f"<tr><td>{_e(r.assay)}</td><td>{_e(r.readout)}</td><td>{n(r.value_nM)}</td>"
        f"<td>{fmt.duration(None if r.incubation_h is None else r.incubation_h * 3600.0, missing='–')}</td>"
        f"<td>{n(r.predicted_nM)}</td><td>{n(r.equilibrium_nM)}</td><td>{fmt.fold(r.fold, missing='–')}</td>"
        f"<td>{_e(r.fold_ci)}</td></tr>"
        for r in table.itertuples(index=False)
    )
    return ("<table><tr><th>Assay</th><th>Readout</th><th>Measured</th><th>Incubation</th>"
            "<th>Predicted apparent</th><th>Projected true</th><th>Fold shift</th><th>Fold 95% interval</th></tr>"
            + rows + "</table>")


def _brief_section(row: Any, graded: dict[str, Any]) -> str:
    """A compound without its evidence tables and charts (large packs): identity, grade, findings."""
    return (f'<div class="compound"><h3 id="{html.escape(row.compound)}">{_e(row.compound)} {_badge(graded.get("grade"))}</h3>'
            f'<p class="meta">{_e(row.program)} · series {_e(row.series)} · stage {_e(row.stage)}</p>'
            + _findings_html(graded.get("findings") or []) + "</div>")


def _since_last_pack(engine: Engine) -> str:
    """What changed since the last recorded pack (tracker.services.history), or a note that this is the first."""
    from ..services.history import changes, changes_markdown_lines, last_pack_time

    since = last_pack_time(engine)
    if since is None:
        return "<h2>Since the last pack</h2><p class='meta'>No earlier pack is recorded for this database: this is the first.</p>"
    lines = changes_markdown_lines(changes(engine, since))
    body = "".join(f"<li>{_e(line)}</li>" for line in lines) if lines else "<li>Nothing changed.</li>"
    return f"<h2>Since the last pack</h2><p class='meta'>Since {since:%Y-%m-%d %H:%M} UTC</p><ul>{body}</ul>"


def _structure_html(smiles: object) -> str:
    """The RDKit drawing (tracker.io.structures) as an embedded SVG image (a data URI, like the charts)."""
    from .widgets import structure_thumbnail

    uri = structure_thumbnail(smiles, 260, 180)
    return f'<img class="structure" alt="structure drawing" src="{uri}">' if uri else ""


def _compound_section(engine: Engine, name: str, graded: dict[str, Any], with_charts: bool, result) -> str:
    info = data.read_compound(engine, name)
    comp, program = info["compound"], info["program"]
    ev = evidence.of(result, name)
    parts = [f'<div class="compound"><h3 id="{html.escape(name)}">{_e(name)} {_badge(graded.get("grade"))}</h3>',
             f'<p class="meta">{_e(comp["program"])} · series {_e(comp.get("series"))} · stage {_e(comp["stage"])} · '
             f'kinetics: {_e(ev.source)}'
             + (f" · residence time {_e(fmt_time(ev.rt_s))}" if ev.rt_s else "")
             + (f" · worst reading {_e(ev.summary.get('worst_reading'))} ({_e(fmt_fold(ev.summary.get('worst_fold_shift')))})"
                if isinstance(ev.summary.get("worst_reading"), str) else "") + "</p>",
             _structure_html(comp.get("smiles")),
             _findings_html(graded.get("findings") or [])]
    table = evidence.potency_table(ev)
    parts.append(_potency_html(table))
    if with_charts:
        if not ev.readings.empty or ev.koff:
            parts.append(_img(evidence.affinity_chart(ev).properties(width=620),
                              f"{name}: apparent affinity against incubation time"))
        if ev.koff and not info["pk"].empty:
            try:
                eng = evidence.engagement(result, ev.compound_id)
                if eng is not None:
                    chart = evidence.engagement_chart(eng, program).properties(width=620)
                    parts.append(f'<p class="meta">Engagement under PK: {_e(evidence.engagement_regimen(eng))}</p>')
                    parts.append(_img(chart, f"{name}: target engagement against time"))
            except Exception as exc:  # a PK row the simulation refuses: say so, keep the pack
                parts.append(f'<p class="meta">Engagement not simulated: {_e(" ".join(str(exc).split()))}</p>')
        for title, chart, summary in evidence.fit_charts(info["fits"]):
            parts.append(f'<p class="meta">Fit: {_e(title)} — ' + "; ".join(f"{_e(k)} {_e(v)}" for k, v in summary.items()) + "</p>")
            if chart is not None:
                parts.append(_img(chart.properties(width=620), f"{name}: {title}"))
    parts.append("</div>")
    return "".join(parts)


def build_pack(
    engine: Engine,
    *,
    program: str | None = None,
    compounds: Iterable[str] | None = None,
    author: str = "",
    graded: list[dict[str, Any]] | None = None,
    with_charts: bool = True,
    progress: Callable[[int, int], None] | None = None,
    result: Any = None,
) -> str:
    """The pack as one HTML string (see the module docstring).

    ``compounds`` narrows to those names (within ``program`` if given);
    ``graded`` reuses an already computed grading (the service's list) and
    ``result`` the grader's full result it came from (the evidence model's numbers);
    ``progress(done, total)`` is called as the charts are rendered.
    """
    pending = _Charts()
    token = _charts.set(pending)
    try:
        text = _assemble(engine, program=program, compounds=compounds, author=author, graded=graded,
                         with_charts=with_charts, result=result)
    finally:
        _charts.reset(token)
    return pending.render(text, progress)


def _signatures_html(engine: Engine, compounds: list[str] | None) -> str:
    """Gate decisions with their electronic signatures (printed name, UTC time, meaning; 21 CFR Part 11 §11.50)."""
    from ..db import queries
    from ..services.gates import signature_text

    sigs = queries.signatures(engine, compounds=compounds)
    if sigs.empty:
        return "<h2>Signed gate decisions</h2><p class='meta'>No gate decisions yet.</p>"
    rows = []
    for did, group in sigs.groupby("decision_id", sort=True):
        first = group.iloc[0]
        signed = "<br>".join(_e(signature_text(r)) for r in group.to_dict("records"))
        rows.append(f"<tr><td>{int(did)}</td><td>{_e(first['compound'])}</td><td>{_e(first['from_stage'])} → {_e(first['to_stage'])}</td>"
                    f"<td>{_e(first['outcome'])}</td><td>{signed}</td></tr>")
    return ("<h2>Signed gate decisions</h2><table><tr><th>Decision</th><th>Compound</th><th>Move</th><th>Outcome</th>"
            "<th>Signatures (printed name, UTC time: meaning)</th></tr>" + "".join(rows) + "</table>")


def _assemble(engine: Engine, *, program: str | None, compounds: Iterable[str] | None, author: str,
              graded: list[dict[str, Any]] | None, with_charts: bool, result: Any = None) -> str:
    from ..db.audit import chain_head
    from ..db.uow import UnitOfWork

    names = None if compounds is None else list(compounds)
    summary = data.read_compound_summary(engine, data.SummaryFilter(program=program, compounds=tuple(names or ())))
    if result is None:
        result = data.read_grading(engine, program)
    if graded is None:
        graded = result.to_records()
    rows = data.merge_portfolio(summary, data.grade_table(graded), data.evidence_table(result))
    rows = rows.sort_values(["grade_rank", "stage_rank", "compound"], ascending=[True, False, True]).reset_index(drop=True)
    by_name = {g["compound"]: g for g in graded}
    with UnitOfWork(engine, write=False) as uow:
        head_id, head_hash = chain_head(uow.session)
    now = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    scope = program or ("selected compounds" if names else "all programs")
    title = f"Kinetic-risk review pack: {scope}"
    counts = rows["grade_key"].value_counts()
    count_text = " · ".join(f"{theme.GRADES[k].badge}: {int(counts.get(k, 0))}" for k in ("high", "moderate", "low", "clear"))
    import json

    stamp = {"created_at": dt.datetime.now(dt.timezone.utc).isoformat(), "audit_head_id": int(head_id), "audit_head_hash": head_hash,
             "program": program}
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<meta name='krt-audit-head' content='{head_hash}' data-events='{head_id}'>",
        # machine-readable stamp: `krt changes --since PACK` and the next pack's "since the last pack" read it
        f"<meta name='{PACK_META}' content='{html.escape(json.dumps(stamp, sort_keys=True), quote=True)}'>",
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p class='meta'>Built {now}{' by ' + html.escape(author) if author else ''} · {len(rows)} compound(s) · "
        f"audit chain head: event {head_id}, hash <code class='audit-head'>{head_hash}</code> "
        "(check later with <code>krt audit verify --expect-head HASH</code>)</p>",
        "<div class='caution'><b>" + html.escape(theme.SAFETY_TITLE) + ".</b><ul>"
        + "".join(f"<li>{html.escape(p)}</li>" for p in theme.SAFETY_POINTS) + "</ul></div>",
        f"<h2>Summary</h2><p>{count_text}</p>",
    ]
    if with_charts and not rows.empty:
        parts.append(_img(charts.grade_counts_chart(charts.grade_counts_frame(rows)), "grade counts by stage and program"))
    parts.append(_summary_table(rows))
    parts.append(_since_last_pack(engine))
    parts.append("<h2>Compounds</h2>")
    charted = with_charts and len(rows) <= MAX_CHART_COMPOUNDS
    if with_charts and not charted:
        parts.append(f"<p class='meta'>{len(rows)} compounds: charts and potency tables are left out above "
                     f"{MAX_CHART_COMPOUNDS}; build a pack of fewer compounds for them.</p>")
    detailed = len(rows) <= MAX_CHART_COMPOUNDS  # beyond that: findings only, no per-compound queries or charts
    for row in rows.itertuples(index=False):
        g = by_name.get(row.compound, {})
        parts.append(_compound_section(engine, row.compound, g, charted, result) if detailed else _brief_section(row, g))
    parts.append(_signatures_html(engine, None if names is None and program is None else list(rows["compound"])))
    parts.append("<p class='meta'>Apparent-affinity predictions assume one binding site without depletion; engagement assumes "
                 "free drug. " + html.escape(" ".join(theme.SAFETY_POINTS)) + "</p>")
    parts.append("</body></html>")
    return "".join(parts)


__all__ = ["build_pack", "chart_data_uri", "MAX_CHART_COMPOUNDS"]
