"""Name keys that catch near-duplicate names: the same letters up to case, width or look-alike characters.

``AUR-001``, ``aur-001``, ``ＡＵＲ-００１`` (full width), ``AUR‐001`` (a Unicode
hyphen) and ``АUR-001`` (a Cyrillic А) all get the same :func:`name_key`, so an
import that would add one beside another is refused with a located error
instead of splitting one compound's evidence over two records.

The key is the Unicode NFKC normal form (compatibility characters such as full
width letters, ligatures and superscripts folded; Unicode Standard Annex #15),
case-folded, with a short table of Greek and Cyrillic capitals and small letters
that print like Latin ones and of dash and space variants mapped to their ASCII
look-alikes (the common cases of the Unicode confusables list, Unicode Technical
Standard #39; a subset chosen here, not the whole list).
"""

from __future__ import annotations

import unicodedata

_LOOKALIKE = str.maketrans({
    # Cyrillic (after case folding) that print like Latin letters
    "а": "a", "в": "b", "е": "e", "к": "k", "м": "m", "н": "h", "о": "o", "р": "p", "с": "c", "т": "t",
    "у": "y", "х": "x", "і": "i", "ј": "j", "ѕ": "s", "ԁ": "d", "һ": "h", "ӏ": "l",
    # Greek (after case folding)
    "α": "a", "β": "b", "ε": "e", "ζ": "z", "η": "n", "ι": "i", "κ": "k", "μ": "m", "ν": "v", "ο": "o",
    "ρ": "p", "τ": "t", "υ": "u", "χ": "x",
    # dashes, minus signs and spaces
    "‐": "-", "‑": "-", "‒": "-", "–": "-", "—": "-", "―": "-", "−": "-", "﹘": "-", "⁃": "-",
    "\u00a0": " ", "\u2007": " ", "\u202f": " ",
    # zero-width characters vanish
    "\u200b": None, "\u200c": None, "\u200d": None, "\u2060": None, "\ufeff": None,
})


def name_key(name: str) -> str:
    """The comparison key of a name: NFKC, case-folded, look-alikes mapped, runs of spaces collapsed."""
    text = unicodedata.normalize("NFKC", name).casefold().translate(_LOOKALIKE)
    return " ".join(unicodedata.normalize("NFKC", text).split())


__all__ = ["name_key"]
