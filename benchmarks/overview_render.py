"""Benchmark of the risk overview (kept out of the installed package): server-side render time under AppTest against reading the same table.

:func:`measure_overview` is what the project's benchmark entry point calls
(it prints nothing itself and asserts nothing; goals are judged by whoever
prints the table).  Figures, each the median of ``repeats`` runs:

* ``db_read_s``: :func:`tracker.ui.data.read_compound_summary`, the one SQL
  query behind the table (the baseline);
* ``render_cold_s``: the first run of the page in a fresh session and a fresh
  cache: the summary query plus grading the whole portfolio (once);
* ``render_warm_s``: a rerun with the database unchanged (every query and the
  grades come from the cache keyed on the database version): what a lead
  waits for when sorting, paging or coming back to the page;
* ``render_filter_s``: a rerun after changing the stage filter (a new SQL
  ``WHERE``, grades still cached).

Ratios are against ``db_read_s``.  Run in a process of its own: the Streamlit
caches are process-wide.
"""

from __future__ import annotations

import os
import statistics
import time
from pathlib import Path
from typing import Any

APP = Path(__file__).resolve().parent.parent / "tracker" / "ui" / "main.py"


def _median(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def measure_overview(url: str, repeats: int = 5, user: str = "bench") -> dict[str, Any]:
    """Time the risk overview on the database at ``url`` (see the module docstring), as a viewer nobody signed in."""
    import streamlit as st
    from streamlit.testing.v1 import AppTest

    from tracker.ui.data import get_engine, read_compound_summary

    os.environ["KRT_DATABASE_URL"] = url
    engine = get_engine(url)
    db_read = _median(lambda: read_compound_summary(engine), repeats)

    def cold():
        st.cache_data.clear()
        at = AppTest.from_file(str(APP), default_timeout=600)
        at.run()
        if at.exception:
            raise RuntimeError(at.exception[0].value)

    AppTest.from_file(str(APP), default_timeout=600).run()  # imports and first-use costs out of the way
    render_cold = _median(cold, max(1, repeats // 2))
    at = AppTest.from_file(str(APP), default_timeout=600)
    at.run()
    render_warm = _median(at.run, repeats)
    stages = iter(["candidate", "hit", "lead-optimization", "advanced-lead", "hit-to-lead", "clinical"] * repeats)

    def filtered():
        at.multiselect(key="ov_stage").set_value([next(stages)]).run()

    render_filter = _median(filtered, repeats)
    rows = len(read_compound_summary(engine))
    return {
        "compounds": rows,
        "db_read_s": db_read,
        "render_cold_s": render_cold,
        "render_warm_s": render_warm,
        "render_filter_s": render_filter,
        "ratio_cold": render_cold / db_read,
        "ratio_warm": render_warm / db_read,
        "ratio_filter": render_filter / db_read,
    }


if __name__ == "__main__":  # python benchmarks/overview_render.py URL
    import sys

    result = measure_overview(sys.argv[1] if len(sys.argv) > 1 else os.environ.get("KRT_DATABASE_URL", ""))
    width = max(len(k) for k in result)
    for k, v in result.items():
        print(f"{k:<{width}}  {v:.3f}" if isinstance(v, float) else f"{k:<{width}}  {v}")
