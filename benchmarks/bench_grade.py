"""Benchmark: import + grade of 10,000 compounds against the time pandas needs just to read the CSVs.

Generates an invented portfolio in the import format (potency for every
compound, kinetics for ~30%, PK for ~20%) in a temporary folder, then, in the
same run and on the same files:

* ``read_csv`` (the floor): ``pandas.read_csv`` of every file;
* ``import``: ``tracker.services.importing.import_path`` into a fresh SQLite file;
* ``grade``: ``tracker.services.grading.grade_result`` of the whole portfolio
  (load through the queries + the vectorised grading pass);
* ``import + grade``: the sum, whose ratio to the floor is the goal (<= 10x).

Times are medians over ``repeats`` runs (each import into a new database).
Peak memory of the grade is measured separately with ``tracemalloc`` (Python
and numpy allocations) and as the process's peak RSS (``resource``).

Run: ``python benchmarks/bench_grade.py [--compounds N] [--repeats R] [--profile]``.
``run(repeats=3)`` returns the table as a list of dicts.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import pstats
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from tracker.db import migrate  # noqa: E402
from tracker.db.session import make_engine  # noqa: E402
from tracker.kinetics.assay import saturation_fold  # noqa: E402
from tracker.services.grading import grade_result  # noqa: E402
from tracker.services.importing import import_path  # noqa: E402

GOAL_RATIO = 10.0
STAGES = ("hit", "hit-to-lead", "lead-optimization", "advanced-lead", "candidate", "clinical")
STAGE_P = (0.40, 0.25, 0.20, 0.08, 0.05, 0.02)


def generate(folder: Path, n: int = 10_000, seed: int = 20261201) -> dict[str, int]:
    """Write programs/compounds/potency/kinetics/pk CSVs for ``n`` invented compounds; returns row counts."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    programs = pd.DataFrame({
        "program": ["Bench-A", "Bench-B", "Bench-C", "Bench-D"],
        "target": ["kinase (invented)", "receptor (invented)", "protease (invented)", "receptor 2 (invented)"],
        "intended_profile": ["once-daily", "short-acting", "twice-daily", ""],
        "engagement_threshold": ["0.7", "30 %", "0.5", ""],
        "onset_max": ["3 h", "30 min", "2 h", ""],
        "duration_min": ["20 h", "2 h", "10 h", ""],
        "offset_max": ["", "8 h", "", ""],
        "dosing_interval": ["24 h", "", "12 h", ""],
    })
    prog = rng.integers(0, 4, n)
    names = np.array([f"BENCH-{i:06d}" for i in range(n)])
    compounds = pd.DataFrame({
        "compound": names,
        "program": programs["program"].to_numpy()[prog],
        "series": [f"S{p}-{s:02d}" for p, s in zip(prog, rng.integers(0, 40, n))],
        "stage": rng.choice(STAGES, n, p=STAGE_P),
        "smiles": "",
    })
    kon = 10 ** rng.uniform(5, 7, n)
    rt = 10 ** rng.uniform(1.5, 5.5, n)
    kd = 1.0 / (kon * rt)
    fmt_of_program = np.array(["binding", "competition-binding", "enzyme", "functional"])[prog]
    readout = np.select([fmt_of_program == "binding", fmt_of_program == "competition-binding", fmt_of_program == "enzyme"],
                        ["KD", "Ki", "IC50"], "Kb")
    inc_short = rng.choice([15 * 60.0, 30 * 60.0, 3600.0], n)
    # the apparent value each assay would read (one-step approximation), with 20% log-normal noise
    app_short = kd * saturation_fold(inc_short / rt) * np.exp(rng.normal(0, 0.2, n))
    rows = {
        "compound": names, "assay": [f"assay-{p}" for p in prog], "readout": readout,
        "value": [f"{v * 1e9:.4g} nM" for v in app_short], "incubation": [f"{t / 60:.0f} min" for t in inc_short],
        "format": fmt_of_program,
    }
    potency = pd.DataFrame(rows)
    tracer = fmt_of_program == "competition-binding"
    potency["tracer_conc"] = np.where(tracer, "1 nM", "")
    potency["tracer_kd"] = np.where(tracer, "0.5 nM", "")
    potency["tracer_residence_time"] = np.where(tracer, "10 min", "")
    mrf = np.where((fmt_of_program == "functional") & (rng.random(n) < 0.5), np.clip(1.0 - rt / 2e5, 0.2, 1.0), np.nan)
    potency["max_response_fraction"] = [f"{v:.2f}" if np.isfinite(v) else "" for v in mrf]
    potency["date"] = ""
    potency["source"] = ""
    # 30% also measured at a long incubation (a Ki-shift pair)
    two = rng.random(n) < 0.3
    long_t = 16 * 3600.0
    app_long = kd[two] * saturation_fold(long_t / rt[two]) * np.exp(rng.normal(0, 0.2, int(two.sum())))
    extra = potency[two].copy()
    extra["value"] = [f"{v * 1e9:.4g} nM" for v in app_long]
    extra["incubation"] = "16 h"
    extra["max_response_fraction"] = ""
    potency = pd.concat([potency, extra], ignore_index=True)
    has_k = rng.random(n) < 0.30
    lo = np.exp(-rng.uniform(0.1, 0.7, n))
    kinetics = pd.DataFrame({
        "compound": names[has_k], "method": rng.choice(["spr", "competition-kinetics", "jump-dilution"], int(has_k.sum())),
        "kon": [f"{v:.4g} /M/s" for v in kon[has_k]], "koff": [f"{v:.4g} /s" for v in 1 / rt[has_k]], "residence_time": "",
        "kd": "", "kon_low": "", "kon_high": "",
        "koff_low": [f"{v * l:.4g} /s" for v, l in zip(1 / rt[has_k], lo[has_k])],
        "koff_high": [f"{v / l:.4g} /s" for v, l in zip(1 / rt[has_k], lo[has_k])],
        "date": "2026-01-15", "source": "",
    })
    has_pk = rng.random(n) < 0.20
    pk = pd.DataFrame({
        "compound": names[has_pk], "species": rng.choice(["rat", "dog", "human"], int(has_pk.sum())), "route": "oral",
        "half_life": [f"{v:.3g} h" for v in rng.uniform(1, 12, int(has_pk.sum()))],
        "free_cmax": [f"{v:.3g} nM" for v in 10 ** rng.uniform(0, 2.5, int(has_pk.sum()))],
        "tmax": [f"{v:.2g} h" for v in rng.uniform(0.3, 3, int(has_pk.sum()))], "dosing_interval": "", "source": "",
    })
    tables = {"programs": programs, "compounds": compounds, "potency": potency, "kinetics": kinetics, "pk": pk}
    for name, df in tables.items():
        df.to_csv(folder / f"{name}.csv", index=False)
    return {name: len(df) for name, df in tables.items()}


def _read_all(folder: Path) -> int:
    return sum(len(pd.read_csv(p, dtype=str, keep_default_na=False)) for p in sorted(folder.glob("*.csv")))


def _timed(fn):
    """(wall s, CPU s of this process, result).  CPU time is steadier on a shared machine."""
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    return time.perf_counter() - t0, time.process_time() - c0, out


def run(repeats: int = 3, n: int = 10_000, profile: bool = False) -> list[dict]:
    """Median times, ratios to the read_csv floor, peak memory; one dict per row of the table."""
    with tempfile.TemporaryDirectory(prefix="krt-bench-") as tmp:
        tmp = Path(tmp)
        counts = generate(tmp / "csv", n)
        reads, imports, grades = [], [], []
        engine = None
        for i in range(repeats):
            reads.append(_timed(lambda: _read_all(tmp / "csv"))[:2])
            if engine is not None:
                engine.dispose()
            engine = make_engine(f"sqlite:///{tmp / f'bench-{i}.sqlite'}")
            migrate.upgrade(engine)
            imports.append(_timed(lambda: import_path(engine, tmp / "csv", actor="bench", progress=False))[:2])
            grades.append(_timed(lambda: grade_result(engine))[:2])
        result, _ = grade_result(engine)
        n_findings = len(result.findings)
        grades_count = result.compounds["grade"].value_counts().to_dict()
        tracemalloc.start()
        grade_result(engine)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        if profile:
            prof = cProfile.Profile()
            prof.enable()
            grade_result(engine)
            prof.disable()
            buf = io.StringIO()
            pstats.Stats(prof, stream=buf).sort_stats("cumulative").print_stats(30)
            print(buf.getvalue())
        engine.dispose()
    try:
        import resource

        rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    except ImportError:  # pragma: no cover - not on Windows
        rss_mb = float("nan")
    def med(xs, k):
        return statistics.median(x[k] for x in xs)

    both = [(a[0] + b[0], a[1] + b[1]) for a, b in zip(imports, grades)]
    floor, floor_cpu = med(reads, 0), med(reads, 1)
    rows = []
    for step, xs in (("read_csv (floor)", reads), ("import", imports), ("grade", grades), ("import + grade", both)):
        rows.append({"step": step, "median_s": med(xs, 0), "ratio_to_floor": med(xs, 0) / floor,
                     "median_cpu_s": med(xs, 1), "cpu_ratio_to_floor": med(xs, 1) / floor_cpu})
    rows[-1].update({"goal": f"<= {GOAL_RATIO:g}x", "met": rows[-1]["ratio_to_floor"] <= GOAL_RATIO})
    info = {"compounds": counts["compounds"], "potency_rows": counts["potency"], "kinetics_rows": counts["kinetics"],
            "pk_rows": counts["pk"], "findings": n_findings, "grades": grades_count,
            "grade_peak_traced_MB": peak / 2**20, "process_peak_rss_MB": rss_mb, "repeats": repeats}
    for r in rows:
        r.update(info)
    return rows


def print_table(rows: list[dict]) -> None:
    info = rows[0]
    print(f"krt grade benchmark: {info['compounds']:,} compounds, {info['potency_rows']:,} potency rows, "
          f"{info['kinetics_rows']:,} kinetics rows, {info['pk_rows']:,} PK rows; median of {info['repeats']} run(s)")
    print(f"{'step':<18} {'wall s':>8} {'x floor':>8} {'CPU s':>8} {'x floor':>8}")
    for r in rows:
        extra = f"   goal {r['goal']} (wall): {'met' if r['met'] else 'NOT met'}" if "goal" in r else ""
        print(f"{r['step']:<18} {r['median_s']:>8.3f} {r['ratio_to_floor']:>8.1f} {r['median_cpu_s']:>8.3f} "
              f"{r['cpu_ratio_to_floor']:>8.1f}{extra}")
    print(f"grade: {info['findings']:,} findings; grades {info['grades']}")
    print(f"peak memory of one grade (tracemalloc): {info['grade_peak_traced_MB']:.0f} MB; process peak RSS {info['process_peak_rss_MB']:.0f} MB")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--compounds", type=int, default=10_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--profile", action="store_true", help="print a cProfile of one grade")
    args = ap.parse_args(argv)
    print_table(run(args.repeats, args.compounds, args.profile))
    return 0


if __name__ == "__main__":
    sys.exit(main())
