"""Benchmark: the portfolio page (risk overview) rendered server-side under Streamlit's AppTest, 10,000 compounds.

Builds an invented 10,000-compound portfolio with the generator of
``bench_grade.py`` (same files, same seed), imports it into a fresh SQLite
file, then measures in a separate Python process (Streamlit's caches are
process-wide) with :func:`overview_render.measure_overview`:

* ``db_read_s``: the one SQL query behind the page's table (the baseline);
* ``render_warm_s``: a rerun of the page with the database unchanged (queries
  and grades come from the cache keyed on the database version); goal <= 3x
  the DB read;
* ``render_cold_s``: the first view in a fresh session and cache (the query
  plus grading the whole portfolio once);
* ``render_filter_s``: a rerun after changing the stage filter.

Each figure is the median of ``repeats`` runs.  Run:
``python benchmarks/bench_portfolio_page.py [repeats] [compounds]``; from code,
``run(repeats=3) -> list[dict]``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for p in (str(ROOT), str(HERE)):
    if p not in sys.path:
        sys.path.insert(0, p)

GOAL_RATIO = 3.0
N = 10_000

_CHILD = (
    "import json, sys\n"
    "from overview_render import measure_overview\n"
    "res = measure_overview(sys.argv[1], repeats=int(sys.argv[2]))\n"
    "print('KRT-BENCH-JSON ' + json.dumps(res))\n"
)


def build_database(folder: Path, n: int = N) -> tuple[str, float]:
    """An imported SQLite database of ``n`` invented compounds; ``(url, import seconds)``."""
    from bench_grade import generate

    from tracker.db import migrate
    from tracker.db.session import make_engine
    from tracker.services.importing import import_path

    generate(folder / "csv", n)
    url = f"sqlite:///{folder / 'portfolio.sqlite'}"
    engine = make_engine(url)
    try:
        migrate.upgrade(engine)
        t0 = time.perf_counter()
        import_path(engine, folder / "csv", actor="bench", progress=False)
        seconds = time.perf_counter() - t0
        with engine.connect() as conn:
            conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        engine.dispose()
    return url, seconds


def measure(url: str, repeats: int) -> dict:
    """:func:`overview_render.measure_overview` in a child process; its result dict."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), str(HERE), os.environ.get("PYTHONPATH", "")])))
    proc = subprocess.run([sys.executable, "-c", _CHILD, url, str(repeats)], capture_output=True, text=True, env=env,
                          cwd=str(ROOT), timeout=1800)
    for line in proc.stdout.splitlines():
        if line.startswith("KRT-BENCH-JSON "):
            return json.loads(line.removeprefix("KRT-BENCH-JSON "))
    tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
    raise RuntimeError(f"page benchmark failed (exit {proc.returncode}): {tail}")


def run(repeats: int = 3, n: int = N) -> list[dict]:
    """One dict per table row: warm render, cold render and filter rerun, each against the DB read."""
    with tempfile.TemporaryDirectory(prefix="krt-page-bench-") as tmp:
        url, import_s = build_database(Path(tmp), n)
        res = measure(url, repeats)
    rows = []
    for key, case, goal in (("render_warm_s", "page rerun, cached (sort/page/return)", GOAL_RATIO),
                            ("render_cold_s", "first view, fresh cache (grades computed)", None),
                            ("render_filter_s", "rerun after a stage filter change", None)):
        ratio = res[key] / res["db_read_s"]
        rows.append({"case": case, "compounds": res["compounds"], "render_s": res[key], "db_read_s": res["db_read_s"],
                     "ratio": ratio, "goal": goal, "met": None if goal is None else ratio <= goal,
                     "import_s": import_s, "repeats": repeats})
    return rows


def print_table(rows: list[dict]) -> None:
    print(f"portfolio page, {rows[0]['compounds']:,} compounds; median of {rows[0]['repeats']} run(s)")
    print(f"{'case':<44} {'render':>9} {'DB read':>9} {'ratio':>7} {'goal':>6} {'met':>4}")
    for r in rows:
        goal = f"{r['goal']:g}x" if r["goal"] else ""
        met = "" if r["met"] is None else ("yes" if r["met"] else "NO")
        print(f"{r['case']:<44} {r['render_s']:>8.3f}s {r['db_read_s']:>8.3f}s {r['ratio']:>6.1f}x {goal:>6} {met:>4}")


if __name__ == "__main__":
    print_table(run(int(sys.argv[1]) if len(sys.argv) > 1 else 3, int(sys.argv[2]) if len(sys.argv) > 2 else N))
