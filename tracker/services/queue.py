"""The measurement queue: which compound's kinetics would change a decision most.

Score (design choice; the ranking is what matters, not the number)::

    score = stage weight x (1 + grade rank) x uncertainty

* stage weight: how close the next gate is to patients and how costly a
  wrong call is there: hit 1, hit-to-lead 2, lead-optimization 4,
  advanced-lead 6, candidate 8, clinical 8 (common practice: kinetics of
  leads by the advanced-lead stage at the latest);
* grade rank: clear 0, low 1, moderate 2, high 3 (a measurement resolves
  inferred findings and duration checks that wait for kinetics);
* uncertainty: 1 without a residence time, 0.8 when kinetic runs conflict
  (design choice: the residence time may be off by more than the conflict
  fold until a lead resolves it), 0.6 when the stored residence time
  is only a lower bound, 0.5 when its 95% interval spans more than 10-fold,
  else 0 (a precise measurement exists; the compound is not queued).

Each entry suggests the assay: competition kinetics with the existing tracer
for receptor programs that have one, jump dilution for enzymes,
association-dissociation binding or SPR for direct binding formats,
functional washout recovery when only functional data exist
(:func:`tracker.rules.checks.suggest_assay`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..domain import STAGES
from ..rules.checks import assay_suggestions
from ..rules.config import SEVERITY_RANK
from ..rules.grader import GradeResult, Portfolio
from .grading import grade_result

__all__ = ["measurement_queue", "rank_queue", "STAGE_WEIGHT", "WIDE_INTERVAL_FOLD"]

STAGE_WEIGHT: dict[str, float] = {
    "hit": 1.0, "hit-to-lead": 2.0, "lead-optimization": 4.0, "advanced-lead": 6.0, "candidate": 8.0, "clinical": 8.0,
}
WIDE_INTERVAL_FOLD = 10.0  # koff_high/koff_low above which the residence time counts as uncertain (design choice)
UNCERTAINTY = {"unmeasured": 1.0, "conflicting": 0.8, "lower-bound": 0.6, "wide-interval": 0.5}


def rank_queue(result: GradeResult, portfolio: Portfolio) -> pd.DataFrame:
    """Pure ranking from a grade result and its frames; one row per queued compound, best first."""
    comp = result.compounds.copy()
    if comp.empty:
        return pd.DataFrame(columns=["rank", "compound", "program", "series", "stage", "grade", "score", "uncertainty", "reason", "suggested_assay"])
    kin = result.kinetics  # the evidence model's kinetics: replicate runs combined, conflicts flagged
    status = pd.Series("unmeasured", index=comp["compound_id"])
    if kin is not None and not kin.empty:
        k = kin.set_index("compound_id")
        lo = k["koff_low_per_s"].astype(float)
        hi = k["koff_high_per_s"].astype(float)
        wide = (hi / lo) > WIDE_INTERVAL_FOLD
        lower = k["rt_lower_bound"].astype(object).fillna(False).astype(bool)
        conflict = k["conflict"].astype(object).fillna(False).astype(bool)
        measured = pd.Series("measured", index=k.index)
        measured[wide.fillna(False)] = "wide-interval"
        measured[lower] = "lower-bound"
        measured[conflict] = "conflicting"
        status.loc[measured.index.intersection(status.index)] = measured
    comp["uncertainty"] = comp["compound_id"].map(status).to_numpy()
    u = comp["uncertainty"].map(UNCERTAINTY).fillna(0.0).to_numpy()
    w = comp["stage"].map(STAGE_WEIGHT).fillna(1.0).to_numpy()
    g = comp["grade"].map(SEVERITY_RANK).fillna(0).to_numpy()
    comp["score"] = w * (1.0 + g) * u
    comp = comp[comp["score"] > 0]
    comp["suggested_assay"] = comp["compound_id"].map(assay_suggestions(portfolio.potency, comp["compound_id"]))
    why = {"unmeasured": "no residence time measured", "lower-bound": "residence time only a lower bound",
           "wide-interval": f"residence-time interval wider than {WIDE_INTERVAL_FOLD:g}-fold",
           "conflicting": "kinetic runs conflict (resolve which stands)"}
    comp["reason"] = [
        f"{s}, grade {gr}; {why[un]}" + (f"; top finding: {tr}" if isinstance(tr, str) else "")
        for s, gr, un, tr in zip(comp["stage"], comp["grade"], comp["uncertainty"], comp["top_rule"])
    ]
    comp["_stage"] = comp["stage"].map({s: i for i, s in enumerate(STAGES)})
    comp = comp.sort_values(["score", "_stage", "compound"], ascending=[False, False, True], kind="mergesort").reset_index(drop=True)
    comp["rank"] = np.arange(1, len(comp) + 1)
    return comp[["rank", "compound", "program", "series", "stage", "grade", "score", "uncertainty", "reason", "suggested_assay"]]


def measurement_queue(engine, program: str | None = None, limit: int | None = None) -> list[dict[str, Any]]:
    """The ranked queue as JSON-ready dicts (see the module docstring)."""
    result, portfolio = grade_result(engine, program)
    df = rank_queue(result, portfolio)
    if limit is not None:
        df = df.head(int(limit))
    out = []
    for r in df.to_dict("records"):
        r["series"] = None if isinstance(r["series"], float) else r["series"]
        r["score"] = float(r["score"])
        r["rank"] = int(r["rank"])
        out.append(r)
    return out
