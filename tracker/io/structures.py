"""Chemical structures from SMILES, with RDKit: the check on import and the drawing every front end shows.

* :func:`smiles_problem` -> ``None`` for a SMILES RDKit reads, else a one-line
  reason (the import refuses such a row as ``compounds.csv:LINE: smiles: ...``).
* :func:`draw_svg` -> an SVG drawing (``rdMolDraw2D.MolDraw2DSVG``) or
  ``None`` when there is nothing to draw.  Only the molecule is drawn: no user
  text (names, notes) is ever put into the SVG, so it can be embedded in HTML
  as it is.

RDKit's own log is silenced (``RDLogger.DisableLog("rdApp.*")``): parse
problems come back as our one-line messages instead of stderr noise.
"""

from __future__ import annotations

from functools import lru_cache

__all__ = ["smiles_problem", "draw_svg"]


def _chem():
    from rdkit import Chem, RDLogger

    RDLogger.DisableLog("rdApp.*")
    return Chem


@lru_cache(maxsize=4096)
def _mol(smiles: str):
    return _chem().MolFromSmiles(smiles)


def smiles_problem(smiles: str) -> str | None:
    """Why RDKit cannot read ``smiles`` (one line), or ``None`` when it can."""
    text = str(smiles).strip()
    if not text:
        return None
    if any(c.isspace() for c in text):
        return f"not a SMILES: {text[:60]!r} contains white space"
    if _mol(text) is None:
        return f"RDKit cannot read SMILES {text[:60]!r} (check brackets, ring closures and valences)"
    return None


@lru_cache(maxsize=1024)
def draw_svg(smiles: str | None, width: int = 260, height: int = 180) -> str | None:
    """The molecule as an SVG document (no XML header), or ``None`` without a readable SMILES."""
    if not smiles or not str(smiles).strip():
        return None
    mol = _mol(str(smiles).strip())
    if mol is None:
        return None
    from rdkit.Chem.Draw import rdMolDraw2D

    drawer = rdMolDraw2D.MolDraw2DSVG(int(width), int(height))
    opts = drawer.drawOptions()
    opts.clearBackground = False
    opts.addStereoAnnotation = True
    rdMolDraw2D.PrepareAndDrawMolecule(drawer, mol)
    drawer.FinishDrawing()
    svg = drawer.GetDrawingText()
    start = svg.find("<svg")
    return svg[start:] if start >= 0 else svg
