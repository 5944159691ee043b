"""The dashboard's look in one place: grade colours and labels, chart colours, the safety text.

Every page, chart and the review pack read their grade colours and labels from
:data:`GRADES`, so a grade looks the same wherever it appears.  The palette is
our own: a warm brick for high risk, ochre for moderate, slate blue for low and
a muted sage for compounds without findings.  Each label also carries a glyph,
so the grade reads without colour (printouts, colour-blind readers).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..fmt import GRADE_LABELS as _WORDS
from ..fmt import UNGRADED_LABEL


@dataclass(frozen=True)
class GradeStyle:
    key: str  # the grading layer's value
    label: str  # what people read
    glyph: str  # shape cue that does not depend on colour
    colour: str  # hex
    rank: int  # 0 = worst

    @property
    def badge(self) -> str:
        return f"{self.glyph} {self.label}"


#: Grade values of the grading layer, worst first.  ``clear`` = no finding.  The words come from
#: :data:`tracker.fmt.GRADE_LABELS`, which the CLI prints too.
GRADES: dict[str, GradeStyle] = {
    "high": GradeStyle("high", _WORDS["high"], "▲", "#B5432A", 0),
    "moderate": GradeStyle("moderate", _WORDS["moderate"], "◆", "#C99A2E", 1),
    "low": GradeStyle("low", _WORDS["low"], "▼", "#4F7CA8", 2),
    "clear": GradeStyle("clear", _WORDS["clear"], "○", "#7D9C84", 3),
}
#: Used for a compound the grader returned nothing for (should not happen; shown, never hidden).
UNGRADED = GradeStyle("ungraded", UNGRADED_LABEL, "·", "#A3A3A3", 4)

#: Grading-layer values that mean "no finding" (the canonical one is ``clear``).
CLEAR_ALIASES = ("clear", "none", "ok", "no-finding", "")


def grade_key(value: object) -> str:
    """The :data:`GRADES` key for a grading-layer value (``None``/unknown -> ``ungraded``)."""
    if value is None or (isinstance(value, float) and value != value):
        return "ungraded"
    text = str(value).strip().lower()
    if text in GRADES:
        return text
    if text in CLEAR_ALIASES:
        return "clear"
    return "ungraded"


def grade_style(value: object) -> GradeStyle:
    return GRADES.get(grade_key(value), UNGRADED)


def grade_label(value: object) -> str:
    """``'▲ High risk'`` for ``'high'``: the text every page and the pack show."""
    return grade_style(value).badge


def style_for_label(label: object) -> GradeStyle:
    """The style whose badge text is ``label`` (``'▲ High risk'`` -> the high style); unknown -> ungraded."""
    for g in GRADES.values():
        if g.badge == label:
            return g
    return UNGRADED


#: Labels in order worst -> best, and their colours, for Altair scales (domain/range).
GRADE_LABELS: tuple[str, ...] = tuple(g.badge for g in GRADES.values()) + (UNGRADED.badge,)
GRADE_COLOURS: tuple[str, ...] = tuple(g.colour for g in GRADES.values()) + (UNGRADED.colour,)

#: Severity of a single finding uses the grade palette (a grade is its worst finding).
SEVERITY_ORDER: dict[str, int] = {"high": 0, "moderate": 1, "low": 2}

# Chart colours other than grades
INK = "#2B2F36"  # axes, text
MEASURED = "#2B2F36"  # data points
MODEL = "#3C6E71"  # model curves (teal)
MODEL_BAND = "#9CC5C7"  # confidence band
RAPID = "#A07DB8"  # rapid-equilibrium (PK-only) curve
THRESHOLD = "#B5432A"  # engagement threshold
WINDOW = "#E9E2D0"  # program windows (onset limit ...)
GUIDE = "#8A8F98"  # iso-lines and rules of thumb
FLOOR = "#C99A2E"  # assay floor

FONT = "Source Sans Pro, Helvetica, Arial, sans-serif"

#: Always-visible safety text (gate page, what-if, review pack).
SAFETY_TITLE = "Decision support only"
SAFETY_POINTS: tuple[str, ...] = (
    "Simulations and grades are decision support, not dosing advice.",
    "An underestimated affinity means more target coverage than assumed, with a risk of mechanism-based toxicity.",
    "Defer to qualified pharmacology, toxicology and regulatory guidance (and your local SOPs), "
    "in particular on first-in-human dose selection.",
)


def safety_markdown() -> str:
    return f"**{SAFETY_TITLE}.** " + " ".join(SAFETY_POINTS)


__all__ = [
    "GradeStyle",
    "GRADES",
    "UNGRADED",
    "GRADE_LABELS",
    "GRADE_COLOURS",
    "SEVERITY_ORDER",
    "grade_key",
    "grade_style",
    "grade_label",
    "style_for_label",
    "safety_markdown",
    "SAFETY_POINTS",
    "SAFETY_TITLE",
]

#: The app-wide Streamlit theme; ``.streamlit/config.toml`` holds the same values for
#: ``streamlit run app.py`` from a checkout, and ``krt demo open`` passes them as flags.
APP_THEME = {
    "primaryColor": "#3C6E71",
    "backgroundColor": "#FFFFFF",
    "secondaryBackgroundColor": "#F4F2EE",
    "textColor": "#2B2F36",
}
