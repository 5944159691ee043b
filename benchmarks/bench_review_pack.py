"""Review pack of the demo portfolio: build time with every chart rendered, against grading the same portfolio.

The goal is absolute (the demo pack within 3 s); the ratio to the grading it
needs anyway says how much the pack adds.  Each run starts with an empty chart
cache, so it measures a first build.  ``python benchmarks/bench_review_pack.py``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for p in (str(ROOT), str(HERE)):
    if p not in sys.path:
        sys.path.insert(0, p)

GOAL_S = 3.0


def run(repeats: int = 3) -> dict:
    from tracker.db import migrate
    from tracker.db.session import make_engine
    from tracker.services.demo import load_demo
    from tracker.services.grading import grade_portfolio
    from tracker.ui import review_pack

    with tempfile.TemporaryDirectory(prefix="krt-pack-bench-") as tmp:
        engine = make_engine(f"sqlite:///{Path(tmp) / 'demo.sqlite'}")
        try:
            migrate.upgrade(engine)
            load_demo(engine)
            grade_times, pack_times, size, charts = [], [], 0, 0
            for _ in range(repeats):
                t = time.perf_counter()
                graded = grade_portfolio(engine)
                grade_times.append(time.perf_counter() - t)
                review_pack._svg_cached.cache_clear()
                t = time.perf_counter()
                text = review_pack.build_pack(engine, graded=graded)
                pack_times.append(time.perf_counter() - t)
                size, charts = len(text), text.count('<img class="chart"')
        finally:
            engine.dispose()
    pack, grade = statistics.median(pack_times), statistics.median(grade_times)
    return {"compounds": len(graded), "charts": charts, "kB": size / 1024, "pack_s": pack, "grade_s": grade,
            "ratio": pack / grade, "goal_s": GOAL_S, "met": pack <= GOAL_S, "repeats": repeats}


if __name__ == "__main__":
    r = run()
    print(f"{'figure':<44} {'value':>9} {'baseline':>9} {'ratio':>7} {'goal':>7} met")
    print(f"{'demo review pack, ' + str(r['charts']) + ' charts, first build':<44} {r['pack_s']:>8.2f}s {r['grade_s']:>8.2f}s "
          f"{r['ratio']:>6.1f}x {'<=' + format(r['goal_s'], 'g') + 's':>7} {'yes' if r['met'] else 'no'}")
