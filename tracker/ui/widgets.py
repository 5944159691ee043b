"""Small rendering helpers the pages share: grade badges, findings, the safety box, number formats."""

from __future__ import annotations

import html
import math
import re
from typing import Any

import streamlit as st

from .. import fmt
from . import theme

RULE_TITLES = {
    "residence-time-unmeasured": "Residence time not measured",
    "affinity-underestimate": "Affinity probably underestimated",
    "duration-mismatch": "Engagement does not fit the intended profile",
    "stage-skip": "Skips a stage",
}


def rule_title(rule: str | None) -> str:
    if not rule:
        return ""
    return RULE_TITLES.get(rule, rule.replace("-", " ").capitalize())


def badge_html(grade: object) -> str:
    g = theme.grade_style(grade)
    return (f'<span style="background:{g.colour};color:white;border-radius:4px;padding:1px 8px;'
            f'font-weight:600;white-space:nowrap">{html.escape(g.badge)}</span>')


def badge(grade: object) -> None:
    st.markdown(badge_html(grade), unsafe_allow_html=True)


def safety_box() -> None:
    """The always-visible caution (gate, what-if, review pack pages)."""
    st.warning(
        f"**{theme.SAFETY_TITLE}.**\n\n" + "\n".join(f"- {p}" for p in theme.SAFETY_POINTS),
        icon=":material/health_and_safety:",
    )


_MARKDOWN_SPECIAL = re.compile(r"([\\`*_{}\[\]()#+\-.!|~<>$:&=^])")


_WWW = re.compile(r"(?i)(www)(\\\.)")


def md(text: object) -> str:
    """User-supplied text (names, notes, messages quoting them) for a Markdown element, rendered as typed.

    Every Markdown character is backslash-escaped (CommonMark lets any ASCII
    punctuation be escaped) and line breaks become spaces, so ``**bold**``,
    ``[x](http://evil)``, headings, lists and ``:material/...:`` directives
    show as their characters instead of formatting or links.
    """
    escaped = _MARKDOWN_SPECIAL.sub(r"\\\1", " ".join(str(text).split()))
    # GitHub-flavoured autolinks (http://..., www...., a@b.c) ignore backslash escapes: an invisible word joiner
    # (U+2060) after every colon, inside "www." and before every "@" keeps them text
    escaped = escaped.replace("\\:", "\\:\u2060").replace("@", "\u2060@")
    return _WWW.sub("\\1\u2060\\2", escaped)


def finding_card(f: dict[str, Any]) -> None:
    """One finding: severity, rule, the message with its numbers, the prompt and any caution."""
    sev = f.get("severity")
    with st.container(border=True):
        st.markdown(f"{badge_html(sev)} &nbsp; **{html.escape(rule_title(f.get('rule')))}** "
                    f"<span style='color:#8A8F98'>({html.escape(str(f.get('rule', '')))})</span>",
                    unsafe_allow_html=True)
        st.markdown(md(f.get("message", "")))
        if f.get("prompt"):
            st.markdown(f"**Decision asked:** {md(f['prompt'])}")
        if f.get("caution"):
            st.caption(f":material/warning: Caution: {md(f['caution'])}")


def findings_list(findings: list[dict[str, Any]], empty: str = "No findings: nothing in the kinetic evidence flags this compound.") -> None:
    if not findings:
        st.success(empty, icon=":material/check_circle:")
        return
    order = theme.SEVERITY_ORDER
    for f in sorted(findings, key=lambda f: order.get(f.get("severity"), 9)):
        finding_card(f)


def structure_html(smiles: object, width: int = 260, height: int = 180) -> str | None:
    """The compound's structure drawn by RDKit (tracker.io.structures), wrapped for the page; None without SMILES.

    The SVG holds only the drawing (no user text), so it is embedded as it is.
    """
    from ..io.structures import draw_svg

    svg = draw_svg(smiles if isinstance(smiles, str) else None, width, height)
    if svg is None:
        return None
    return f'<div class="krt-structure" role="img" aria-label="structure drawing">{svg}</div>'


def structure_thumbnail(smiles: object, width: int = 120, height: int = 80) -> str | None:
    """A drawing as a ``data:image/svg+xml`` URL (table image columns, the review pack); None without SMILES."""
    import base64

    from ..io.structures import draw_svg

    svg = draw_svg(smiles if isinstance(smiles, str) else None, width, height)
    return None if svg is None else "data:image/svg+xml;base64," + base64.b64encode(svg.encode("utf-8")).decode("ascii")


def structure(smiles: object) -> None:
    html_ = structure_html(smiles)
    if html_ is None:
        st.caption("No structure on record (give a SMILES in compounds.csv).")
    else:
        st.markdown(html_, unsafe_allow_html=True)


def conc(v: Any) -> str:
    """Molar value as readable text ('3.2 nM'); '–' when missing."""
    f = _num(v)
    return fmt.conc(f, missing="–")


def dur(v: Any) -> str:
    f = _num(v)
    return fmt.duration(f, missing="–")


def fold(v: Any) -> str:
    f = _num(v)
    return fmt.fold(f, missing="–")


def _num(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


__all__ = ["structure", "structure_html", "structure_thumbnail", "badge", "badge_html", "safety_box", "finding_card", "findings_list", "rule_title", "conc", "dur", "fold", "one_line", "md"]
