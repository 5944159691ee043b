"""Review pack: one offline HTML file of grades, findings, prompts, cautions and charts."""

from __future__ import annotations

import datetime as dt
import re

import streamlit as st

from tracker.ui import data, review_pack, widgets
from tracker.ui.main import context


def file_name(scope: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9]+", "-", scope).strip("-").lower() or "portfolio"
    return f"review-pack-{slug}-{dt.date.today().isoformat()}.html"


def render() -> None:
    ctx = context()
    st.title("Review pack")
    st.caption("One HTML file for a governance meeting: the grades, every finding with its decision prompt and caution, "
               "potency against the kinetic predictions, and the charts as embedded images. It opens offline.")
    widgets.safety_box()
    names = data.compound_names(ctx.url, ctx.version, ctx.program)
    scope = ctx.program or "all programs"
    picked = st.multiselect(f"Compounds (leave empty for the whole of {scope})", names, key="pack_compounds")
    with_charts = st.toggle("Include charts", value=True, key="pack_charts")
    n = len(picked) or len(names)
    if with_charts and n > review_pack.MAX_CHART_COMPOUNDS:
        st.caption(f"{n} compounds: charts are included up to {review_pack.MAX_CHART_COMPOUNDS}; pick fewer for charts.")
    if st.button("Build pack", type="primary", key="pack_build", icon=":material/description:"):
        bar = st.progress(0.0, text="Gathering the evidence ...")
        author = ctx.identity.name if ctx.identity else ""
        result = data.grading(ctx.url, ctx.version, ctx.program)
        text = review_pack.build_pack(
            ctx.engine, program=ctx.program, compounds=picked or None, author=author, graded=result.to_records(), result=result,
            with_charts=with_charts, progress=lambda done, total: bar.progress(done / total, text=f"Rendering chart {done} of {total}"))
        bar.empty()
        from tracker.services.history import record_pack

        record_pack(ctx.engine, text, author or None)  # the next pack says what changed since this one
        data.clear_caches()
        label = ", ".join(picked[:3]) + (" …" if len(picked) > 3 else "") if picked else scope
        st.session_state["pack_html"] = (text, file_name(label if not picked else f"{scope}-selection"), label)
    if "pack_html" in st.session_state:
        text, fname, label = st.session_state["pack_html"]
        st.success(f"Pack ready: {label} ({len(text) / 1024:.0f} kB).")
        st.download_button("Download review pack (HTML)", text.encode("utf-8"), file_name=fname, mime="text/html",
                           key="pack_download", icon=":material/download:")
        if st.toggle("Preview here", key="pack_preview"):
            import streamlit.components.v1 as components

            components.html(text, height=720, scrolling=True)  # an iframe: the pack's styles stay inside it


if __name__ == "__main__":
    render()
